//! The arithmetic batch-norm, layer-norm and rms-norm share: statistics over groups of values,
//! x̂ = (x − μ)/√(σ² + ε) (rms-norm: μ = 0, σ² the mean square), y = γ x̂ + β per feature, and the
//! backward pass through the statistics:
//! dx = inv · (dx̂ − mean(dx̂) − x̂ · mean(dx̂ · x̂)) over each group, inv = 1/√(σ² + ε), the
//! mean(dx̂) term only when the mean was subtracted.
//!
//! Catalogued mistakes (DESIGN §7), shared by the three kinds:
//! - `norm-statistics-constant`: dx = inv · dx̂ (the statistics treated as constants);
//! - `norm-epsilon-misplaced`: the formula above with 1/(√σ² + ε) in place of inv (x̂ as saved);
//! - `norm-scale-unnormalised`: dγ = Σ dy · x instead of Σ dy · x̂.
//!
//! Incremental hints: a scale or shift entry moves one feature (channel) of the output,
//! recomputed from the base's saved x̂ with the forward pass's arithmetic (so bit for bit a full
//! pass's); a batch norm whose input changed in some channels only recomputes those channels'
//! statistics and values ([`Layer::forward_channels`](super::Layer::forward_channels)). Layer-
//! and rms-norm mix the channels at each position: their input changes recompute the layer.

use ndarray::{Array1, Array2, ArrayD, ArrayView2, Ix1, Ix2};

use super::{Back, LayerScalar, Moved, ParamSpec, Role, Shape, ShapeError, Step};

pub(crate) const MISTAKES: &[&str] = &[
    "norm-statistics-constant",
    "norm-epsilon-misplaced",
    "norm-scale-unnormalised",
];

/// Over which values the statistics are taken.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Over {
    /// For each feature (channel), over the samples and positions of the batch.
    Batch,
    /// For each sample and position, over the features (channels).
    Features,
}

/// A normalisation bound to its input shape.
#[derive(Clone, Debug)]
pub(crate) struct Norm {
    pub input: Shape,
    pub over: Over,
    /// Whether the mean is subtracted (not for rms-norm).
    pub centre: bool,
    /// Whether a shift β is added (not for rms-norm).
    pub shift: bool,
    pub epsilon: f64,
}

impl Norm {
    pub fn new(
        input: &Shape,
        over: Over,
        centre: bool,
        shift: bool,
        epsilon: f64,
    ) -> Result<Norm, ShapeError> {
        if !(epsilon.is_finite() && epsilon > 0.0) {
            return Err(ShapeError::Epsilon { value: epsilon });
        }
        Ok(Norm {
            input: *input,
            over,
            centre,
            shift,
            epsilon,
        })
    }

    /// The length of the scale and shift.
    pub fn features(&self) -> usize {
        self.input.feature_axis().1
    }

    pub fn params(&self) -> Vec<ParamSpec> {
        let n = self.features();
        let spec = |suffix, role| ParamSpec {
            suffix,
            shape: vec![n],
            role,
            decays: false,
            fan_in: 1,
            fan_out: self.input.size() / n,
        };
        let mut specs = vec![spec("scale", Role::Scale)];
        if self.shift {
            specs.push(spec("shift", Role::Shift));
        }
        specs
    }

    /// How many groups of values share statistics in a batch of `m`.
    fn group_count(&self, m: usize) -> usize {
        let (outer, axis, inner) = self.input.feature_axis();
        match self.over {
            Over::Batch => axis,
            Over::Features => m * outer * inner,
        }
    }

    /// The flat indices (into a standard-layout m × size batch) of group `g`, in a fixed order:
    /// `count` runs of `len` consecutive indices, `stride` apart. A batch-norm feature's values
    /// are one run of `inner` per sample and outer position; a layer-norm group's are the
    /// features at one position, `inner` apart.
    fn group(&self, g: usize, m: usize) -> impl Iterator<Item = usize> + use<> {
        self.runs(g, m).flatten()
    }

    /// Group g's indices as the runs [`Norm::group`] walks, in its order: the passes over a
    /// group loop over slices (the same values in the same order) instead of index by index.
    fn runs(&self, g: usize, m: usize) -> impl Iterator<Item = std::ops::Range<usize>> + use<> {
        let (outer, axis, inner) = self.input.feature_axis();
        let (start, len, stride, count) = match self.over {
            Over::Batch => (g * inner, inner, axis * inner, m * outer),
            Over::Features => ((g / inner) * axis * inner + g % inner, 1, inner, axis),
        };
        (0..count).map(move |r| {
            let b = start + r * stride;
            b..b + len
        })
    }

    /// Group g's mean (0 without centring), biased variance and 1/√(σ² + ε), over the `n`
    /// values of a standard-layout batch `xs` of `m` samples. Both sums go through
    /// [`lane_sum`]: one accumulator made them latency-bound (a batch norm's full pass was a
    /// quarter of the demo CNN's check).
    fn statistics<S: LayerScalar>(&self, xs: &[S], g: usize, m: usize, n: S) -> (S, S, S) {
        let mean = if self.centre {
            lane_sum(self.runs(g, m).map(|run| &xs[run]), |v| v) / n
        } else {
            S::zero()
        };
        let sum = lane_sum(self.runs(g, m).map(|run| &xs[run]), |v| {
            let d = v - mean;
            d * d
        });
        let v = sum / n;
        (mean, v, S::one() / (v + S::from_f64(self.epsilon)).sqrt())
    }

    pub fn forward<S: LayerScalar>(&self, params: &[ArrayD<S>], x: ArrayView2<S>) -> Step<S> {
        let x = x.as_standard_layout();
        let xs = x.as_slice().expect("standard layout");
        let groups = self.group_count(x.nrows());
        let mut xhat = vec![S::zero(); xs.len()];
        let mut out = vec![S::zero(); xs.len()];
        let mut inv = Array1::zeros(groups);
        let mut var = Array1::zeros(groups);
        let saved = Saved {
            xhat: &mut xhat,
            inv: inv.as_slice_mut().expect("new"),
            var: var.as_slice_mut().expect("new"),
        };
        self.normalise(params, xs, x.nrows(), &mut out, Some(saved));
        let shape = x.raw_dim();
        Step {
            out: Array2::from_shape_vec(shape, out).expect("same size"),
            saved: vec![
                Array2::from_shape_vec(shape, xhat)
                    .expect("same size")
                    .into_dyn(),
                inv.into_dyn(),
                var.into_dyn(),
            ],
            branches: Vec::new(),
            ties: 0,
        }
    }

    /// [`Norm::forward`]'s output alone, in `buffer`: what a perturbed pass reads (the
    /// backward pass's x̂ and statistics are neither stored nor allocated). The same bits.
    pub fn forward_into<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        buffer: &mut Vec<S>,
    ) -> Step<S> {
        let x = x.as_standard_layout();
        let xs = x.as_slice().expect("standard layout");
        let mut out = std::mem::take(buffer);
        out.clear();
        out.resize(xs.len(), S::zero());
        self.normalise(params, xs, x.nrows(), &mut out, None);
        Step::plain(Array2::from_shape_vec(x.raw_dim(), out).expect("same size"))
    }

    /// y = γ x̂ + β of a standard-layout batch `xs` of `m` samples into `out`, and x̂ with each
    /// group's 1/√(σ² + ε) and σ² into `saved` when given. On x86-64 machines with AVX2 a batch
    /// norm's value loops are compiled for AVX2 as well (twice the values per instruction of
    /// the baseline build over its runs of positions); the same IEEE operations on each value in
    /// the same order (no fused multiply-add is enabled, and Rust never reorders or contracts
    /// them), so bit for bit the same. A layer norm's groups are strided single values, where
    /// the AVX2 build showed no gain (the sequence model's check, benches/README.md session 13).
    fn normalise<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        xs: &[S],
        m: usize,
        out: &mut [S],
        saved: Option<Saved<'_, S>>,
    ) {
        #[cfg(target_arch = "x86_64")]
        if self.over == Over::Batch && std::arch::is_x86_feature_detected!("avx2") {
            // SAFETY: the CPU has just been found to support AVX2, all that the function needs.
            unsafe { self.normalise_avx2(params, xs, m, out, saved) };
            return;
        }
        self.normalise_loop(params, xs, m, out, saved);
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    unsafe fn normalise_avx2<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        xs: &[S],
        m: usize,
        out: &mut [S],
        saved: Option<Saved<'_, S>>,
    ) {
        self.normalise_loop(params, xs, m, out, saved);
    }

    #[inline(always)]
    fn normalise_loop<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        xs: &[S],
        m: usize,
        out: &mut [S],
        mut saved: Option<Saved<'_, S>>,
    ) {
        let scale = params[0].as_slice().expect("standard layout");
        let groups = self.group_count(m);
        let n = S::from_f64((xs.len() / groups.max(1)) as f64);
        let (_, axis, inner) = self.input.feature_axis();
        let shift = self
            .shift
            .then(|| params[1].as_slice().expect("standard layout"));
        for g in 0..groups {
            let (mean, v, r) = self.statistics(xs, g, m, n);
            for run in self.runs(g, m) {
                // y = γ x̂ + β with the feature of the run's first value: a batch norm's run
                // is one feature's, a layer norm's a single value.
                let a = (run.start / inner.max(1)) % axis;
                let (scale, shift) = (scale[a], shift.map(|b| b[a]));
                let values = out[run.clone()].iter_mut().zip(&xs[run.clone()]);
                match saved.as_mut() {
                    Some(s) => {
                        for (h, (o, &x)) in s.xhat[run].iter_mut().zip(values) {
                            *h = (x - mean) * r;
                            *o = scale * *h;
                            if let Some(b) = shift {
                                *o += b;
                            }
                        }
                    }
                    None => {
                        for (o, &x) in values {
                            *o = scale * ((x - mean) * r);
                            if let Some(b) = shift {
                                *o += b;
                            }
                        }
                    }
                }
            }
            if let Some(s) = saved.as_mut() {
                s.inv[g] = r;
                s.var[g] = v;
            }
        }
    }

    /// The step after scale or shift entry `moved.index` moved: that feature's values from the
    /// base's x̂, the others the base's.
    pub fn forward_moved<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        base: &Step<S>,
        moved: &Moved<S>,
    ) -> Option<Step<S>> {
        let a = moved.index;
        let xhat = base.saved.first()?.as_slice()?;
        let mut scale = params[0][a];
        let mut shift = self.shift.then(|| params[1][a]);
        match (moved.tensor, shift.as_mut()) {
            (0, _) => scale += moved.delta,
            (_, Some(b)) => *b += moved.delta,
            (_, None) => unreachable!("rms-norm has no shift"),
        }
        let mut out = base.out.clone();
        let values = out.as_slice_mut()?;
        for run in self.input.channel_runs(base.out.nrows(), a) {
            for (o, &v) in values[run.clone()].iter_mut().zip(&xhat[run]) {
                *o = scale * v;
                if let Some(b) = shift {
                    *o += b;
                }
            }
        }
        Some(Step::plain(out))
    }

    /// A batch norm's step for an input changed in the channels `changed` only: their
    /// statistics and values again, the others the base's. `None` when the statistics mix the
    /// channels (layer- and rms-norm).
    pub fn forward_channels<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        base: &Step<S>,
        changed: &[usize],
    ) -> Option<Step<S>> {
        if self.over != Over::Batch {
            return None;
        }
        let x = x.as_standard_layout();
        let xs = x.as_slice().expect("standard layout");
        let m = x.nrows();
        let n = S::from_f64((xs.len() / self.group_count(m).max(1)) as f64);
        let mut out = base.out.clone();
        let values = out.as_slice_mut()?;
        #[cfg(target_arch = "x86_64")]
        if std::arch::is_x86_feature_detected!("avx2") {
            // SAFETY: the CPU has just been found to support AVX2, all that the function needs.
            unsafe { self.channels_avx2(params, xs, m, n, changed, values) };
            return Some(Step::plain(out));
        }
        self.channels_loop(params, xs, m, n, changed, values);
        Some(Step::plain(out))
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    unsafe fn channels_avx2<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        xs: &[S],
        m: usize,
        n: S,
        changed: &[usize],
        values: &mut [S],
    ) {
        self.channels_loop(params, xs, m, n, changed, values);
    }

    /// [`Norm::forward_channels`]'s values of the channels `changed` (compiled for AVX2 where
    /// the CPU has it, as [`Norm::normalise`]).
    #[inline(always)]
    fn channels_loop<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        xs: &[S],
        m: usize,
        n: S,
        changed: &[usize],
        values: &mut [S],
    ) {
        for &a in changed {
            // The forward pass's arithmetic for group a (one feature over the batch).
            let (mean, _, r) = self.statistics(xs, a, m, n);
            let (scale, shift) = (params[0][a], self.shift.then(|| params[1][a]));
            for run in self.runs(a, m) {
                for (y, &x) in values[run.clone()].iter_mut().zip(&xs[run]) {
                    *y = scale * ((x - mean) * r);
                    if let Some(b) = shift {
                        *y += b;
                    }
                }
            }
        }
    }

    pub fn backward<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        step: &Step<S>,
        dout: ArrayView2<S>,
        mistake: Option<&str>,
        need_input: bool,
    ) -> Back<S> {
        let x = x.as_standard_layout();
        let xs = x.as_slice().expect("standard layout");
        let dout = dout.as_standard_layout();
        let dy = dout.as_slice().expect("standard layout");
        let xhat = step.saved[0]
            .view()
            .into_dimensionality::<Ix2>()
            .expect("x̂");
        let xhat = xhat.as_slice().expect("standard layout");
        let inv = step.saved[1]
            .view()
            .into_dimensionality::<Ix1>()
            .expect("inv");
        let var = step.saved[2]
            .view()
            .into_dimensionality::<Ix1>()
            .expect("var");
        let scale = params[0]
            .view()
            .into_dimensionality::<Ix1>()
            .expect("scale");
        let n_f = self.features();
        let mut dscale = Array1::zeros(n_f);
        let mut dshift = Array1::zeros(n_f);
        let raw = mistake == Some("norm-scale-unnormalised");
        let against = if raw { xs } else { xhat };
        let (_, axis, inner) = self.input.feature_axis();
        let mut dxhat = vec![S::zero(); xs.len()];
        let runs = dxhat
            .chunks_mut(inner.max(1))
            .zip(dy.chunks(inner.max(1)).zip(against.chunks(inner.max(1))));
        for (r, (d, (dy, v))) in runs.enumerate() {
            let a = r % axis;
            for ((d, &g), &v) in d.iter_mut().zip(dy).zip(v) {
                dscale[a] += g * v;
                dshift[a] += g;
                *d = g * scale[a];
            }
        }
        let m = x.nrows();
        let groups = self.group_count(m);
        let n = S::from_f64((xs.len() / groups.max(1)) as f64);
        let dx = need_input.then(|| {
            let mut dx = vec![S::zero(); xs.len()];
            for g in 0..groups {
                if mistake == Some("norm-statistics-constant") {
                    for k in self.group(g, m) {
                        dx[k] = dxhat[k] * inv[g];
                    }
                    continue;
                }
                let r = if mistake == Some("norm-epsilon-misplaced") {
                    S::one() / (var[g].sqrt() + S::from_f64(self.epsilon))
                } else {
                    inv[g]
                };
                let mean_d = if self.centre {
                    self.group(g, m).fold(S::zero(), |acc, k| acc + dxhat[k]) / n
                } else {
                    S::zero()
                };
                let mean_dx = self
                    .group(g, m)
                    .fold(S::zero(), |acc, k| acc + dxhat[k] * xhat[k])
                    / n;
                for k in self.group(g, m) {
                    dx[k] = r * (dxhat[k] - mean_d - xhat[k] * mean_dx);
                }
            }
            Array2::from_shape_vec(x.raw_dim(), dx).expect("same size")
        });
        let mut grads = vec![dscale.into_dyn()];
        if self.shift {
            grads.push(dshift.into_dyn());
        }
        Back {
            params: grads,
            dx,
            dskip: None,
        }
    }
}

/// What a full forward pass keeps for the backward pass: x̂, and per group 1/√(σ² + ε) and σ².
struct Saved<'a, S> {
    xhat: &'a mut [S],
    inv: &'a mut [S],
    var: &'a mut [S],
}

/// How many partial sums [`lane_sum`] keeps: enough independent additions in flight to hide
/// their latency (four AVX2 vectors of f64, two of f32).
const LANES: usize = 16;

/// Σ f(v) over the values of `runs` in a fixed order that does not wait on one accumulator: the
/// value at offset k of its run goes to partial sum k mod [`LANES`], and the partial sums are
/// added pairwise at the end. A run shorter than two values (a layer norm's, a batch norm's of
/// flat features) is the plain sum in order. The full pass and the channel-wise update both sum
/// through here, so they agree bit for bit (global average pooling's means too).
#[inline(always)]
pub(crate) fn lane_sum<'v, S: LayerScalar>(
    runs: impl Iterator<Item = &'v [S]>,
    f: impl Fn(S) -> S,
) -> S {
    let mut lanes = [S::zero(); LANES];
    for run in runs {
        let mut chunks = run.chunks_exact(LANES);
        for chunk in &mut chunks {
            for (l, &v) in lanes.iter_mut().zip(chunk) {
                *l += f(v);
            }
        }
        for (l, &v) in lanes.iter_mut().zip(chunks.remainder()) {
            *l += f(v);
        }
    }
    let mut width = LANES;
    while width > 1 {
        width /= 2;
        for k in 0..width {
            let v = lanes[k + width];
            lanes[k] += v;
        }
    }
    lanes[0]
}

/// Implements [`super::Kind`]'s parameter, mistake and shape methods and [`super::Layer`] for a
/// norm kind that wraps a [`Norm`] in its field `norm`.
macro_rules! norm_kind {
    ($t:ty, $name:literal) => {
        impl $crate::graph::Kind for $t {
            fn linear_in_params(&self) -> bool {
                true
            }
            fn kind(&self) -> &'static str {
                $name
            }
            fn input(&self) -> $crate::graph::Shape {
                self.norm.input
            }
            fn output(&self) -> $crate::graph::Shape {
                self.norm.input
            }
            fn params(&self) -> Vec<$crate::graph::ParamSpec> {
                self.norm.params()
            }
            fn mistakes(&self) -> &'static [&'static str] {
                $crate::graph::norm::MISTAKES
            }
            fn locate(&self, _: usize, flat: usize) -> String {
                format!("feature {flat}")
            }
            fn moved_channel(&self, _: usize, index: usize) -> Option<usize> {
                Some(index)
            }
        }

        impl<S: $crate::graph::LayerScalar> $crate::graph::Layer<S> for $t {
            fn forward(
                &self,
                params: &[ndarray::ArrayD<S>],
                x: ndarray::ArrayView2<S>,
                _: Option<ndarray::ArrayView2<S>>,
            ) -> $crate::graph::Step<S> {
                self.norm.forward(params, x)
            }
            fn forward_into(
                &self,
                params: &[ndarray::ArrayD<S>],
                x: ndarray::ArrayView2<S>,
                _: Option<ndarray::ArrayView2<S>>,
                buffer: &mut Vec<S>,
            ) -> $crate::graph::Step<S> {
                self.norm.forward_into(params, x, buffer)
            }
            fn backward(
                &self,
                params: &[ndarray::ArrayD<S>],
                x: ndarray::ArrayView2<S>,
                step: &$crate::graph::Step<S>,
                dout: ndarray::ArrayView2<S>,
                mistake: Option<&str>,
                need_input: bool,
            ) -> $crate::graph::Back<S> {
                self.norm
                    .backward(params, x, step, dout, mistake, need_input)
            }
            fn forward_moved(
                &self,
                params: &[ndarray::ArrayD<S>],
                _: ndarray::ArrayView2<S>,
                base: &$crate::graph::Step<S>,
                moved: &$crate::graph::Moved<S>,
            ) -> Option<$crate::graph::Step<S>> {
                self.norm.forward_moved(params, base, moved)
            }
            fn forward_channels(
                &self,
                params: &[ndarray::ArrayD<S>],
                x: ndarray::ArrayView2<S>,
                _: Option<ndarray::ArrayView2<S>>,
                base: &$crate::graph::Step<S>,
                changed: &[usize],
            ) -> Option<$crate::graph::Step<S>> {
                self.norm.forward_channels(params, x, base, changed)
            }
        }
    };
}
pub(crate) use norm_kind;
