//! `embedding`: each token id of a `[steps]` token input (a whole number below the vocabulary,
//! carried as the scalar's real part) is replaced by its row of the table (vocabulary × size);
//! the output is [steps, size]. The ids are data, not values to differentiate: the input
//! gradient is zero. The graph's `check_batch` rejects ids that are not whole numbers in range;
//! the passes assume it.
//!
//! Catalogued mistake (DESIGN §7): `embedding-rows-overwritten` — a token seen more than once in
//! the batch gets its row's gradient assigned, not summed; occurrences are visited sample by
//! sample and step by step within a sample, so the last one wins.
//!
//! Incremental hint: none (a lookup costs less than the update would).

use ndarray::{Array2, ArrayD, ArrayView2, s};

use super::recurrent::mat;
use super::{Back, Kind, Layer, LayerScalar, ParamSpec, Role, Shape, ShapeError, Step};

/// An embedding layer bound to its input shape.
#[derive(Clone, Debug)]
pub struct Embedding {
    size: usize,
    steps: usize,
    vocabulary: usize,
}

impl Embedding {
    pub fn new(size: usize, input: &Shape) -> Result<Embedding, ShapeError> {
        if size == 0 {
            return Err(ShapeError::Zero { key: "size" });
        }
        match *input {
            Shape::Tokens { steps, vocabulary } => Ok(Embedding {
                size,
                steps,
                vocabulary,
            }),
            found => Err(ShapeError::Input {
                kind: "embedding",
                needs: "token ids (`input = { tokens, vocabulary }`)",
                found,
                fix: "declare the input as tokens, or drop the embedding for float sequences",
            }),
        }
    }

    fn id<S: LayerScalar>(v: S) -> usize {
        v.re() as usize
    }
}

impl Kind for Embedding {
    fn kind(&self) -> &'static str {
        "embedding"
    }

    fn input(&self) -> Shape {
        Shape::Tokens {
            steps: self.steps,
            vocabulary: self.vocabulary,
        }
    }

    fn output(&self) -> Shape {
        Shape::Sequence {
            steps: self.steps,
            width: self.size,
        }
    }

    fn params(&self) -> Vec<ParamSpec> {
        vec![ParamSpec {
            suffix: "table",
            shape: vec![self.vocabulary, self.size],
            role: Role::Table,
            decays: false,
            fan_in: 1,
            fan_out: self.size,
        }]
    }

    fn mistakes(&self) -> &'static [&'static str] {
        &["embedding-rows-overwritten"]
    }

    fn inside(&self, x: ArrayView2<f64>, _: &Step<f64>) -> Vec<super::Inside> {
        let mut reads = vec![0; self.vocabulary];
        for &v in x {
            if let Some(r) = reads.get_mut(Self::id(v)) {
                *r += 1;
            }
        }
        vec![super::Inside::Rows { tensor: 0, reads }]
    }

    fn locate(&self, _: usize, flat: usize) -> String {
        format!("token {}, feature {}", flat / self.size, flat % self.size)
    }
}

impl<S: LayerScalar> Layer<S> for Embedding {
    fn forward(&self, params: &[ArrayD<S>], x: ArrayView2<S>, _: Option<ArrayView2<S>>) -> Step<S> {
        let table = mat(&params[0]);
        let n = self.size;
        let mut out = Array2::zeros((x.nrows(), self.steps * n));
        for ((i, t), &v) in x.indexed_iter() {
            out.slice_mut(s![i, t * n..(t + 1) * n])
                .assign(&table.row(Self::id(v)));
        }
        Step::plain(out)
    }

    fn backward(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        _: &Step<S>,
        dout: ArrayView2<S>,
        mistake: Option<&str>,
        need_input: bool,
    ) -> Back<S> {
        let n = self.size;
        let overwrite = mistake == Some("embedding-rows-overwritten");
        let mut table = Array2::zeros(mat(&params[0]).raw_dim());
        for ((i, t), &v) in x.indexed_iter() {
            let d = dout.slice(s![i, t * n..(t + 1) * n]);
            let mut row = table.row_mut(Self::id(v));
            if overwrite {
                row.assign(&d);
            } else {
                row += &d;
            }
        }
        Back {
            params: vec![table.into_dyn()],
            // Token ids are data: the loss does not move with them.
            dx: need_input.then(|| Array2::zeros(x.raw_dim())),
            dskip: None,
        }
    }
}
