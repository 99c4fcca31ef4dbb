//! `global-avg-pool`: each channel's mean over its positions, [channels, …] → [channels].

use ndarray::{Array2, ArrayD, ArrayView1, ArrayView2};

use super::{Back, Kind, Layer, LayerScalar, Shape, ShapeError, Step};

/// A global average pool bound to its input shape.
#[derive(Clone, Debug)]
pub struct GlobalAvgPool {
    input: Shape,
    channels: usize,
    positions: usize,
}

impl GlobalAvgPool {
    pub fn new(input: &Shape) -> Result<GlobalAvgPool, ShapeError> {
        let (channels, hw) = input.spatial().ok_or(ShapeError::Input {
            kind: "global-avg-pool",
            needs: "[channels, length] or [channels, height, width]",
            found: *input,
            fix: "remove it: the input has no positions to average over",
        })?;
        Ok(GlobalAvgPool {
            input: *input,
            channels,
            positions: hw[0] * hw[1],
        })
    }
}

impl GlobalAvgPool {
    /// Channel c's mean over its positions in one sample's row (the full pass and the
    /// channel-wise update sum in the same order).
    fn mean<S: LayerScalar>(&self, row: ArrayView1<S>, c: usize) -> S {
        let p = self.positions;
        // The channel's slice where the row has one (the graph's batches do): an iterator that
        // skips to it walks every value before it.
        let sum = match row.as_slice() {
            Some(values) => values[c * p..(c + 1) * p]
                .iter()
                .fold(S::zero(), |acc, &v| acc + v),
            None => row
                .iter()
                .skip(c * p)
                .take(p)
                .fold(S::zero(), |acc, &v| acc + v),
        };
        sum * (S::one() / S::from_f64(p as f64))
    }
}

impl Kind for GlobalAvgPool {
    fn kind(&self) -> &'static str {
        "global-avg-pool"
    }

    fn input(&self) -> Shape {
        self.input
    }

    fn output(&self) -> Shape {
        Shape::Flat(self.channels)
    }
}

impl<S: LayerScalar> Layer<S> for GlobalAvgPool {
    fn forward(&self, _: &[ArrayD<S>], x: ArrayView2<S>, _: Option<ArrayView2<S>>) -> Step<S> {
        let out =
            Array2::from_shape_fn((x.nrows(), self.channels), |(i, c)| self.mean(x.row(i), c));
        Step::plain(out)
    }

    fn forward_channels(
        &self,
        _: &[ArrayD<S>],
        x: ArrayView2<S>,
        _: Option<ArrayView2<S>>,
        base: &Step<S>,
        changed: &[usize],
    ) -> Option<Step<S>> {
        let mut out = base.out.clone();
        for (i, mut row) in out.outer_iter_mut().enumerate() {
            for &c in changed {
                row[c] = self.mean(x.row(i), c);
            }
        }
        Some(Step::plain(out))
    }

    fn backward(
        &self,
        _: &[ArrayD<S>],
        x: ArrayView2<S>,
        _: &Step<S>,
        dout: ArrayView2<S>,
        _: Option<&str>,
        need_input: bool,
    ) -> Back<S> {
        let (p, scale) = (
            self.positions,
            S::one() / S::from_f64(self.positions as f64),
        );
        let dx = need_input
            .then(|| Array2::from_shape_fn(x.raw_dim(), |(i, q)| dout[[i, q / p]] * scale));
        Back {
            params: Vec::new(),
            dx,
            dskip: None,
        }
    }
}
