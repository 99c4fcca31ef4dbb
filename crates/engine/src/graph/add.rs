//! `add`: a residual connection. The output is the previous layer's output plus the output of the
//! earlier layer named by `from` (same shape; the graph checks it); the gradient of the output
//! flows unchanged into both.
//!
//! Catalogued mistake: `skip-gradient-dropped` — the gradient through the connection (to `from`)
//! left out; only tensors below the tapped layer change.

use ndarray::{Array2, ArrayD, ArrayView2};

use super::{Back, Kind, Layer, LayerScalar, Shape, ShapeError, Step};

/// A residual addition bound to its input shape and the name of its tap.
#[derive(Clone, Debug)]
pub struct Add {
    from: String,
    input: Shape,
}

impl Add {
    pub fn new(from: &str, input: &Shape) -> Result<Add, ShapeError> {
        Ok(Add {
            from: from.to_string(),
            input: *input,
        })
    }
}

impl Kind for Add {
    fn kind(&self) -> &'static str {
        "add"
    }

    fn input(&self) -> Shape {
        self.input
    }

    fn output(&self) -> Shape {
        self.input
    }

    fn mistakes(&self) -> &'static [&'static str] {
        &["skip-gradient-dropped"]
    }

    fn tap(&self) -> Option<&str> {
        Some(&self.from)
    }
}

impl<S: LayerScalar> Layer<S> for Add {
    fn forward(&self, _: &[ArrayD<S>], x: ArrayView2<S>, skip: Option<ArrayView2<S>>) -> Step<S> {
        self.forward_into(&[], x, skip, &mut Vec::new())
    }

    fn forward_into(
        &self,
        _: &[ArrayD<S>],
        x: ArrayView2<S>,
        skip: Option<ArrayView2<S>>,
        buffer: &mut Vec<S>,
    ) -> Step<S> {
        let skip = skip.expect("the graph hands `add` its tap");
        let (x, skip) = (x.as_standard_layout(), skip.as_standard_layout());
        let (xs, ss) = (
            x.as_slice().expect("standard"),
            skip.as_slice().expect("standard"),
        );
        let mut out = std::mem::take(buffer);
        out.clear();
        out.resize(xs.len(), S::zero());
        for (o, (&a, &b)) in out.iter_mut().zip(xs.iter().zip(ss)) {
            *o = a + b;
        }
        Step::plain(Array2::from_shape_vec(x.raw_dim(), out).expect("same size"))
    }

    fn forward_channels(
        &self,
        _: &[ArrayD<S>],
        x: ArrayView2<S>,
        skip: Option<ArrayView2<S>>,
        base: &Step<S>,
        changed: &[usize],
    ) -> Option<Step<S>> {
        let skip = skip.expect("the graph hands `add` its tap");
        let (x, skip) = (x.as_standard_layout(), skip.as_standard_layout());
        let (xs, ss) = (x.as_slice()?, skip.as_slice()?);
        let mut out = base.out.clone();
        let values = out.as_slice_mut()?;
        for &c in changed {
            for run in self.input.channel_runs(x.nrows(), c) {
                for k in run {
                    values[k] = xs[k] + ss[k];
                }
            }
        }
        Some(Step::plain(out))
    }

    fn backward(
        &self,
        _: &[ArrayD<S>],
        _: ArrayView2<S>,
        _: &Step<S>,
        dout: ArrayView2<S>,
        mistake: Option<&str>,
        need_input: bool,
    ) -> Back<S> {
        let dskip = (mistake != Some("skip-gradient-dropped")).then(|| dout.to_owned());
        Back {
            params: Vec::new(),
            dx: need_input.then(|| dout.to_owned()),
            dskip,
        }
    }
}
