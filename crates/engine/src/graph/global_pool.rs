//! `global-avg-pool`: each channel's mean over its positions, [channels, …] → [channels].

use ndarray::{Array2, ArrayD, ArrayView2};

use super::norm::lane_sum;
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
    /// A channel's mean over its positions `values` (the full pass and the channel-wise update
    /// both go through here): summed in partial sums ([`lane_sum`]), not waiting on one
    /// accumulator per value.
    fn mean<S: LayerScalar>(&self, values: &[S]) -> S {
        let p = self.positions;
        lane_sum(std::iter::once(values), |v| v) * (S::one() / S::from_f64(p as f64))
    }

    /// Sample i's channels `channels` of a standard-layout batch `xs` into `out` (sample i's
    /// outputs).
    fn means<S: LayerScalar>(
        &self,
        xi: &[S],
        channels: impl Iterator<Item = usize>,
        out: &mut [S],
    ) {
        let p = self.positions;
        for c in channels {
            out[c] = self.mean(&xi[c * p..(c + 1) * p]);
        }
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
        let x = x.as_standard_layout();
        let xs = x.as_slice().expect("standard layout");
        let mut out = Array2::zeros((x.nrows(), self.channels));
        let rows = out.as_slice_mut().expect("made standard");
        let sample = self.channels * self.positions;
        for (o, xi) in rows
            .chunks_exact_mut(self.channels)
            .zip(xs.chunks_exact(sample))
        {
            self.means(xi, 0..self.channels, o);
        }
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
        let x = x.as_standard_layout();
        let xs = x.as_slice()?;
        let mut out = base.out.clone();
        let rows = out.as_slice_mut()?;
        let sample = self.channels * self.positions;
        for (o, xi) in rows
            .chunks_exact_mut(self.channels)
            .zip(xs.chunks_exact(sample))
        {
            self.means(xi, changed.iter().copied(), o);
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
