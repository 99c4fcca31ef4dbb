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
//! Incremental hint: none. A batch norm's scale or shift entry moves one channel, but the layer
//! is cheap beside the convolutions around it; the graph recomputes it.

use ndarray::{Array1, Array2, ArrayD, ArrayView2, Ix1, Ix2};

use super::{Back, LayerScalar, ParamSpec, Role, Shape, ShapeError, Step};

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

    /// The groups of flat indices (into a standard-layout m × size batch) that share statistics.
    fn groups(&self, m: usize) -> Vec<Vec<usize>> {
        let (outer, axis, inner) = self.input.feature_axis();
        let size = self.input.size();
        let at = |i: usize, o: usize, a: usize, j: usize| i * size + (o * axis + a) * inner + j;
        match self.over {
            Over::Batch => (0..axis)
                .map(|a| {
                    let mut g = Vec::with_capacity(m * outer * inner);
                    for i in 0..m {
                        for o in 0..outer {
                            for j in 0..inner {
                                g.push(at(i, o, a, j));
                            }
                        }
                    }
                    g
                })
                .collect(),
            Over::Features => {
                let mut groups = Vec::with_capacity(m * outer * inner);
                for i in 0..m {
                    for o in 0..outer {
                        for j in 0..inner {
                            groups.push((0..axis).map(|a| at(i, o, a, j)).collect());
                        }
                    }
                }
                groups
            }
        }
    }

    /// The feature (index into the scale) of a flat batch index.
    fn feature(&self, flat: usize) -> usize {
        let (_, axis, inner) = self.input.feature_axis();
        (flat % self.input.size() / inner) % axis
    }

    pub fn forward<S: LayerScalar>(&self, params: &[ArrayD<S>], x: ArrayView2<S>) -> Step<S> {
        let x = x.as_standard_layout();
        let xs = x.as_slice().expect("standard layout");
        let scale = params[0]
            .view()
            .into_dimensionality::<Ix1>()
            .expect("scale");
        let groups = self.groups(x.nrows());
        let mut xhat = vec![S::zero(); xs.len()];
        let mut inv = Array1::zeros(groups.len());
        let mut var = Array1::zeros(groups.len());
        for (g, idx) in groups.iter().enumerate() {
            let n = S::from_f64(idx.len() as f64);
            let mean = if self.centre {
                idx.iter().fold(S::zero(), |acc, &k| acc + xs[k]) / n
            } else {
                S::zero()
            };
            let v = idx.iter().fold(S::zero(), |acc, &k| {
                let d = xs[k] - mean;
                acc + d * d
            }) / n;
            let r = S::one() / (v + S::from_f64(self.epsilon)).sqrt();
            for &k in idx {
                xhat[k] = (xs[k] - mean) * r;
            }
            inv[g] = r;
            var[g] = v;
        }
        let mut out = vec![S::zero(); xs.len()];
        for (k, o) in out.iter_mut().enumerate() {
            let a = self.feature(k);
            *o = scale[a] * xhat[k];
            if self.shift {
                *o += params[1][a];
            }
        }
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

    pub fn backward<S: LayerScalar>(
        &self,
        params: &[ArrayD<S>],
        x: ArrayView2<S>,
        step: &Step<S>,
        dout: ArrayView2<S>,
        mistake: Option<&str>,
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
        let mut dxhat = vec![S::zero(); xs.len()];
        let raw = mistake == Some("norm-scale-unnormalised");
        for k in 0..xs.len() {
            let a = self.feature(k);
            dscale[a] += dy[k] * if raw { xs[k] } else { xhat[k] };
            dshift[a] += dy[k];
            dxhat[k] = dy[k] * scale[a];
        }
        let mut dx = vec![S::zero(); xs.len()];
        for (g, idx) in self.groups(x.nrows()).iter().enumerate() {
            if mistake == Some("norm-statistics-constant") {
                for &k in idx {
                    dx[k] = dxhat[k] * inv[g];
                }
                continue;
            }
            let r = if mistake == Some("norm-epsilon-misplaced") {
                S::one() / (var[g].sqrt() + S::from_f64(self.epsilon))
            } else {
                inv[g]
            };
            let n = S::from_f64(idx.len() as f64);
            let mean_d = if self.centre {
                idx.iter().fold(S::zero(), |acc, &k| acc + dxhat[k]) / n
            } else {
                S::zero()
            };
            let mean_dx = idx
                .iter()
                .fold(S::zero(), |acc, &k| acc + dxhat[k] * xhat[k])
                / n;
            for &k in idx {
                dx[k] = r * (dxhat[k] - mean_d - xhat[k] * mean_dx);
            }
        }
        let mut grads = vec![dscale.into_dyn()];
        if self.shift {
            grads.push(dshift.into_dyn());
        }
        Back {
            params: grads,
            dx: Array2::from_shape_vec(x.raw_dim(), dx).expect("same size"),
            dskip: None,
        }
    }
}

/// Implements [`super::Kind`]'s parameter, mistake and shape methods and [`super::Layer`] for a
/// norm kind that wraps a [`Norm`] in its field `norm`.
macro_rules! norm_kind {
    ($t:ty, $name:literal) => {
        impl $crate::graph::Kind for $t {
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
            fn backward(
                &self,
                params: &[ndarray::ArrayD<S>],
                x: ndarray::ArrayView2<S>,
                step: &$crate::graph::Step<S>,
                dout: ndarray::ArrayView2<S>,
                mistake: Option<&str>,
            ) -> $crate::graph::Back<S> {
                self.norm.backward(params, x, step, dout, mistake)
            }
        }
    };
}
pub(crate) use norm_kind;
