//! A network of dense layers: construction, the batched forward pass and analytic backpropagation.

use std::any::TypeId;

use ndarray::linalg::general_mat_mul;
use ndarray::{Array2, ArrayView2, Axis, ShapeBuilder, s};
use thiserror::Error;

use crate::variant::{Regularization, Samples};
use crate::{Activation, Conventions, Loss, Scalar, Variant, Weights};

/// One dense layer: `inputs` units (without the bias unit) mapped to `units` units.
#[derive(Clone, Debug, PartialEq)]
pub struct LayerSpec {
    pub inputs: usize,
    pub units: usize,
    pub activation: Activation,
}

impl LayerSpec {
    /// The augmented matrix's shape: units × (inputs + 1), column 0 multiplies the bias unit.
    pub fn shape(&self) -> (usize, usize) {
        (self.units, self.inputs + 1)
    }

    /// Parameters of this layer, the bias weights included.
    pub fn parameters(&self) -> usize {
        self.units * (self.inputs + 1)
    }
}

/// Why a network cannot be built. Layers are numbered from 1, as in the description.
#[derive(Clone, Debug, PartialEq, Error)]
pub enum NetworkError {
    #[error("the network has no layers: add at least one [[layer]]")]
    NoLayers,
    #[error("`inputs` is 0: a network needs at least one input feature")]
    NoInputs,
    #[error("layer {layer} has 0 units: every layer needs at least one")]
    NoUnits { layer: usize },
    #[error(
        "layer {layer} uses softmax, which is only allowed on the output layer (layer {last}); use another activation there"
    )]
    SoftmaxHidden { layer: usize, last: usize },
    #[error(
        "layer {layer} is a softmax over a single unit, which is always 1; use sigmoid for one output"
    )]
    SoftmaxSingleUnit { layer: usize },
    #[error(
        "cross-entropy needs sigmoid or softmax outputs, but the output layer uses {activation}; change the output activation or use squared-error"
    )]
    LossNeedsProbabilities { activation: String },
    #[error("l2 is {value}; it must be a finite number ≥ 0")]
    BadL2 { value: f64 },
    #[error("layer {layer}: {what} is {value}; {rule}")]
    BadActivationParameter {
        layer: usize,
        what: &'static str,
        value: f64,
        rule: &'static str,
    },
}

/// A dense network with its loss, L2 strength and conventions: the architecture, without the
/// weights.
#[derive(Clone, Debug, PartialEq)]
pub struct Network {
    layers: Vec<LayerSpec>,
    loss: Loss,
    l2: f64,
    conventions: Conventions,
}

/// What the forward pass leaves behind for the backward pass and for inspection.
///
/// `z[l]` is the pre-activation that layer `l` (0-based) produces, m × units of that layer in the 1-based
/// numbering of the docs; `a[0]` is the input batch and `a[l + 1] = g(z[l])`.
#[derive(Clone, Debug)]
pub struct Trace<S> {
    pub z: Vec<Array2<S>>,
    pub a: Vec<Array2<S>>,
}

impl<S> Trace<S> {
    /// The network's output for the batch.
    pub fn output(&self) -> &Array2<S> {
        self.a.last().expect("a trace always holds the input")
    }
}

impl Network {
    /// Builds a network from the number of inputs and (units, activation) per layer, checking every
    /// rule a description must obey.
    pub fn new(
        inputs: usize,
        layers: &[(usize, Activation)],
        loss: Loss,
        l2: f64,
    ) -> Result<Self, NetworkError> {
        if layers.is_empty() {
            return Err(NetworkError::NoLayers);
        }
        if inputs == 0 {
            return Err(NetworkError::NoInputs);
        }
        if !(l2.is_finite() && l2 >= 0.0) {
            return Err(NetworkError::BadL2 { value: l2 });
        }
        let last = layers.len();
        let mut specs = Vec::with_capacity(layers.len());
        let mut fan_in = inputs;
        for (i, &(units, activation)) in layers.iter().enumerate() {
            let layer = i + 1;
            if units == 0 {
                return Err(NetworkError::NoUnits { layer });
            }
            check_activation(layer, activation)?;
            if activation == Activation::Softmax {
                if layer != last {
                    return Err(NetworkError::SoftmaxHidden { layer, last });
                }
                if units == 1 {
                    return Err(NetworkError::SoftmaxSingleUnit { layer });
                }
            }
            specs.push(LayerSpec {
                inputs: fan_in,
                units,
                activation,
            });
            fan_in = units;
        }
        let output = specs[last - 1].activation;
        if !loss.accepts(output) {
            return Err(NetworkError::LossNeedsProbabilities {
                activation: output.to_string(),
            });
        }
        Ok(Network {
            layers: specs,
            loss,
            l2,
            conventions: Conventions::default(),
        })
    }

    /// The same network under other conventions (reduction, L2 divisor, bias decay).
    pub fn with_conventions(mut self, conventions: Conventions) -> Network {
        self.conventions = conventions;
        self
    }

    pub fn conventions(&self) -> Conventions {
        self.conventions
    }

    pub fn layers(&self) -> &[LayerSpec] {
        &self.layers
    }

    pub fn loss(&self) -> Loss {
        self.loss
    }

    /// λ of the L2 term (λ / divisor) · Σ w² over the weights that decay (see [`Conventions`]).
    pub fn l2(&self) -> f64 {
        self.l2
    }

    /// The number of input features.
    pub fn inputs(&self) -> usize {
        self.layers[0].inputs
    }

    /// The number of output units.
    pub fn outputs(&self) -> usize {
        self.layers[self.layers.len() - 1].units
    }

    /// Parameters over all layers, bias weights included.
    pub fn parameters(&self) -> usize {
        self.layers.iter().map(LayerSpec::parameters).sum()
    }

    /// Whether a weight set has one augmented matrix of the right shape per layer.
    pub fn fits<S>(&self, weights: &Weights<S>) -> bool {
        weights.layers().len() == self.layers.len()
            && self
                .layers
                .iter()
                .zip(weights.layers())
                .all(|(spec, w)| w.dim() == spec.shape())
    }

    /// Checks a batch against the network: m ≥ 1 samples, the right number of features and targets.
    pub fn check_batch<S>(&self, x: ArrayView2<S>, y: ArrayView2<S>) -> Result<(), String> {
        if x.nrows() == 0 {
            return Err("the batch has no samples".into());
        }
        if x.nrows() != y.nrows() {
            return Err(format!(
                "the batch has {} feature rows but {} target rows",
                x.nrows(),
                y.nrows()
            ));
        }
        if x.ncols() != self.inputs() {
            return Err(format!(
                "the batch has {} features per sample; the network takes {}",
                x.ncols(),
                self.inputs()
            ));
        }
        if y.ncols() != self.outputs() {
            return Err(format!(
                "the batch has {} targets per sample; the network has {} outputs",
                y.ncols(),
                self.outputs()
            ));
        }
        Ok(())
    }

    /// One layer's pre-activation for a batch: z = a · Wᵀ + b, with W and b the augmented matrix's
    /// columns 1.. and 0. One matrix product for the whole batch.
    pub fn affine<S: Scalar>(theta: ArrayView2<S>, a: ArrayView2<S>) -> Array2<S> {
        let w = theta.slice(s![.., 1..]);
        let mut z = a.dot(&w.t());
        z += &theta.column(0);
        z
    }

    /// [`Network::affine`] into `z`, the same values bit for bit in the same memory order,
    /// reusing `z`'s memory when it already has that shape and order. A finite-difference check
    /// of a deep network makes millions of these products of a few values each, where allocating
    /// and the general product's set-up cost more than the arithmetic.
    pub fn affine_into<S: Scalar>(theta: ArrayView2<S>, a: ArrayView2<S>, z: &mut Array2<S>) {
        let (m, n) = (a.nrows(), theta.nrows());
        let w = theta.slice(s![.., 1..]);
        // The order `dot` gives its result: column-major when both factors step by 1 down a
        // column, as a one-column `a` does.
        let column_major = a.strides()[0] == 1 && w.t().strides()[0] == 1;
        let strides = if column_major {
            [1, m as isize]
        } else {
            [n as isize, 1]
        };
        if z.dim() != (m, n) || z.strides() != strides {
            *z = Array2::zeros((m, n).set_f(column_major));
        }
        if theta.ncols() == 2 && (same_type::<S, f64>() || same_type::<S, f32>()) {
            // A fan-in of 1: the product kernels start every sum at +0 and add the one term, which
            // turns a product of −0 into +0; then the bias, as `affine` adds it.
            let x = a.column(0);
            for (r, mut unit) in z.columns_mut().into_iter().enumerate() {
                let (b, w) = (theta[[r, 0]], theta[[r, 1]]);
                unit.zip_mut_with(&x, |v, &x| *v = x * w + S::zero() + b);
            }
        } else {
            general_mat_mul(S::one(), &a, &w.t(), S::zero(), z);
            *z += &theta.column(0);
        }
    }

    /// Layer `l` (0-based) applied to the activations `a` of the layer below: (z, g(z)).
    pub fn layer_forward<S: Scalar>(
        &self,
        l: usize,
        theta: ArrayView2<S>,
        a: ArrayView2<S>,
    ) -> (Array2<S>, Array2<S>) {
        let z = Self::affine(theta, a);
        let out = self.layers[l].activation.apply(z.view());
        (z, out)
    }

    /// The forward pass over a batch (one sample per row of `x`), keeping every layer's values.
    pub fn forward<S: Scalar>(&self, weights: &Weights<S>, x: ArrayView2<S>) -> Trace<S> {
        self.forward_from(weights, 0, x)
    }

    /// The forward pass from layer `start` (0-based) upward, given that layer's input activations;
    /// the trace's `a[0]` is `input`, and `z`, `a` hold only the layers from `start` on.
    pub fn forward_from<S: Scalar>(
        &self,
        weights: &Weights<S>,
        start: usize,
        input: ArrayView2<S>,
    ) -> Trace<S> {
        self.assert_fits(weights);
        let n = self.layers.len() - start;
        let mut z = Vec::with_capacity(n);
        let mut a = Vec::with_capacity(n + 1);
        a.push(input.to_owned());
        for l in start..self.layers.len() {
            let (zl, al) = self.layer_forward(l, weights.layer(l).view(), a[a.len() - 1].view());
            z.push(zl);
            a.push(al);
        }
        Trace { z, a }
    }

    /// Whether a parameter decays under the L2 term: every non-bias weight, and the bias weights
    /// (column 0) when `l2-on-bias` is declared.
    pub fn decays(&self, c: crate::Coord) -> bool {
        c.col != 0 || self.conventions.l2_on_bias
    }

    /// The first column of an augmented matrix the L2 term covers.
    fn first_decaying(&self) -> usize {
        usize::from(!self.conventions.l2_on_bias)
    }

    /// Σ w² over the weights that decay.
    pub fn l2_sum<S: Scalar>(&self, weights: &Weights<S>) -> S {
        let mut sum = S::zero();
        for w in weights.layers() {
            for &v in w.slice(s![.., self.first_decaying()..]).iter() {
                sum += v * v;
            }
        }
        sum
    }

    /// The L2 term from Σ w²: (λ / divisor) · Σ w², with the declared divisor for m samples.
    pub fn l2_term<S: Scalar>(&self, l2_sum: S, m: usize) -> S {
        if self.l2 == 0.0 {
            return S::zero();
        }
        S::from_f64(self.conventions.l2_factor(self.l2, m)) * l2_sum
    }

    /// The L2 term (λ / divisor) · Σ w² over the weights that decay.
    pub fn l2_penalty<S: Scalar>(&self, weights: &Weights<S>, m: usize) -> S {
        if self.l2 == 0.0 {
            return S::zero();
        }
        self.l2_term(self.l2_sum(weights), m)
    }

    /// The data term of the loss from a finished forward pass, under the declared reduction.
    pub fn data_loss<S: Scalar>(&self, trace: &Trace<S>, y: ArrayView2<S>) -> S {
        let out = self.layers[self.layers.len() - 1].activation;
        let z = trace.z.last().expect("a network has at least one layer");
        self.loss.value_with(
            self.conventions.reduction,
            out,
            z.view(),
            trace.output().view(),
            y,
        )
    }

    /// The full loss J(θ): data term plus L2 term.
    pub fn loss_value<S: Scalar>(
        &self,
        weights: &Weights<S>,
        x: ArrayView2<S>,
        y: ArrayView2<S>,
    ) -> S {
        let trace = self.forward(weights, x);
        self.data_loss(&trace, y) + self.l2_penalty(weights, x.nrows())
    }

    /// The full loss evaluated from layer `start` (0-based) upward, with the layers below held fixed:
    /// `input` is layer `start`'s input activations (the trace's `a[start]`). The L2 term still covers
    /// every layer, so the value equals J(θ) for the same weights.
    pub fn loss_from<S: Scalar>(
        &self,
        weights: &Weights<S>,
        start: usize,
        input: ArrayView2<S>,
        y: ArrayView2<S>,
    ) -> S {
        let trace = self.forward_from(weights, start, input);
        self.data_loss(&trace, y) + self.l2_penalty(weights, input.nrows())
    }

    /// The loss and its gradient by analytic backpropagation, one augmented matrix per layer.
    pub fn gradient<S: Scalar>(
        &self,
        weights: &Weights<S>,
        x: ArrayView2<S>,
        y: ArrayView2<S>,
    ) -> (S, Weights<S>) {
        let trace = self.forward(weights, x);
        let loss = self.data_loss(&trace, y) + self.l2_penalty(weights, x.nrows());
        (loss, self.backward(weights, &trace, y))
    }

    /// Backpropagation through a finished forward pass.
    pub fn backward<S: Scalar>(
        &self,
        weights: &Weights<S>,
        trace: &Trace<S>,
        y: ArrayView2<S>,
    ) -> Weights<S> {
        self.backward_with(weights, trace, y, &Variant::REFERENCE)
    }

    /// The gradient a backward pass with one departure from the reference produces (see
    /// [`Variant`]); `Variant::REFERENCE` gives the reference gradient.
    pub fn backward_with<S: Scalar>(
        &self,
        weights: &Weights<S>,
        trace: &Trace<S>,
        y: ArrayView2<S>,
        variant: &Variant,
    ) -> Weights<S> {
        let depth = self.layers.len();
        let m = trace.a[0].nrows();
        let out = self.layers[depth - 1].activation;
        let (z_out, a_out) = (trace.z[depth - 1].view(), trace.a[depth].view());
        let reduction = self.conventions.reduction;
        let mut delta = if variant.other_loss_delta {
            let other = match self.loss {
                Loss::CrossEntropy => Loss::SquaredError,
                Loss::SquaredError => Loss::CrossEntropy,
            };
            match other {
                Loss::SquaredError => {
                    Loss::SquaredError.output_delta_with(reduction, out, z_out, a_out, y)
                }
                // (a − y)/m with no activation step, whatever the output activation.
                Loss::CrossEntropy => Loss::CrossEntropy.output_delta_with(
                    reduction,
                    Activation::Sigmoid,
                    z_out,
                    a_out,
                    y,
                ),
            }
        } else {
            self.loss.output_delta_with(reduction, out, z_out, a_out, y)
        };
        let declared = self.conventions;
        let (reg, on_bias) = match variant.regularization {
            Regularization::Declared => (declared.l2_slope(self.l2, m), declared.l2_on_bias),
            Regularization::Missing => (0.0, declared.l2_on_bias),
            Regularization::Divisor(d) => {
                let other = Conventions {
                    l2_divisor: d,
                    ..declared
                };
                (other.l2_slope(self.l2, m), declared.l2_on_bias)
            }
            Regularization::BiasToggled => (declared.l2_slope(self.l2, m), !declared.l2_on_bias),
        };
        let reg = S::from_f64(reg);
        let scale = S::from_f64(variant.data_scale);
        let rows = match variant.samples {
            Samples::All => 0..m,
            Samples::First => 0..1,
            Samples::Last => m - 1..m,
        };
        let mut grads = Vec::with_capacity(depth);
        for l in (0..depth).rev() {
            let theta = weights.layer(l);
            let (units, cols) = theta.dim();
            let mut g = Array2::zeros((units, cols));
            let d = delta.slice(s![rows.clone(), ..]);
            let a = trace.a[l].slice(s![rows.clone(), ..]);
            g.column_mut(0).assign(&d.sum_axis(Axis(0)));
            g.slice_mut(s![.., 1..]).assign(&d.t().dot(&a));
            if variant.data_scale != 1.0 {
                g.mapv_inplace(|v| v * scale);
            }
            if self.l2 != 0.0 {
                let from = usize::from(!on_bias);
                g.slice_mut(s![.., from..])
                    .zip_mut_with(&theta.slice(s![.., from..]), |gv, &wv| *gv += reg * wv);
            }
            grads.push(g);
            if l > 0 {
                let hidden = l - 1;
                let upstream = if variant.bias_unit_kept == Some(hidden) {
                    // The full augmented product, bias column first, with its last column dropped.
                    let full = delta.dot(theta);
                    full.slice(s![.., ..cols - 1]).to_owned()
                } else {
                    delta.dot(&theta.slice(s![.., 1..]))
                };
                let act = self.layers[hidden].activation;
                delta = if variant.slope_missing == Some(hidden) {
                    upstream
                } else if variant.slope_at_activation == Some(hidden) {
                    let at = &trace.a[l];
                    act.backward(at.view(), act.apply(at.view()).view(), upstream)
                } else {
                    act.backward(trace.z[hidden].view(), trace.a[l].view(), upstream)
                };
            }
        }
        grads.reverse();
        Weights::new(grads)
    }

    fn assert_fits<S>(&self, weights: &Weights<S>) {
        assert!(
            self.fits(weights),
            "weights do not fit the network (check with Network::fits before calling)"
        );
    }
}

fn same_type<A: 'static, B: 'static>() -> bool {
    TypeId::of::<A>() == TypeId::of::<B>()
}

fn check_activation(layer: usize, activation: Activation) -> Result<(), NetworkError> {
    match activation {
        Activation::LeakyRelu { slope } if !(slope.is_finite() && (0.0..1.0).contains(&slope)) => {
            Err(NetworkError::BadActivationParameter {
                layer,
                what: "the leaky-relu slope",
                value: slope,
                rule: "it must be ≥ 0 and < 1",
            })
        }
        Activation::Elu { alpha } if !(alpha.is_finite() && alpha > 0.0) => {
            Err(NetworkError::BadActivationParameter {
                layer,
                what: "the elu alpha",
                value: alpha,
                rule: "it must be a finite number > 0",
            })
        }
        _ => Ok(()),
    }
}

#[cfg(test)]
mod tests {
    use ndarray::{Array2, ShapeBuilder};
    use num_complex::Complex;

    use super::Network;
    use crate::{Rng, Scalar};

    /// Values that tell products apart: signed zeros (a product of −0 must come out as ndarray's
    /// product gives it), a subnormal, infinities, a NaN, and ordinary numbers.
    const SPECIAL: [f64; 8] = [
        0.0,
        -0.0,
        5e-324,
        f64::INFINITY,
        -f64::INFINITY,
        f64::NAN,
        1.5,
        -3.25,
    ];

    fn draw(rng: &mut Rng, special: bool) -> f64 {
        if special && rng.uniform() < 0.4 {
            SPECIAL[(rng.uniform() * SPECIAL.len() as f64) as usize % SPECIAL.len()]
        } else {
            rng.normal()
        }
    }

    fn same<S: Scalar>(x: &Array2<S>, y: &Array2<S>) -> bool {
        x.dim() == y.dim()
            && x.strides() == y.strides()
            && x.iter().zip(y).all(|(&u, &v)| {
                // A NaN's payload is not compared: only that both are one.
                u.same_bits(v) || (u.re().is_nan() && v.re().is_nan())
            })
    }

    /// `affine_into` against `affine` (ndarray's matrix product, the reference), bit for bit and
    /// in the same memory order: fan-in 1 (computed directly) and larger (the general product into
    /// the reused buffer), inputs in either order, a buffer of another shape or order reused.
    fn agrees<S: Scalar>(cast: impl Fn(f64) -> S) {
        let mut rng = Rng::new(17);
        let mut z = Array2::zeros((0, 0));
        for trial in 0..400 {
            let special = trial % 2 == 0;
            let m = 1 + trial % 5;
            let k = [1, 1, 2, 3, 9][trial / 5 % 5];
            let n = 1 + trial / 25 % 4;
            let theta = Array2::from_shape_fn((n, k + 1), |_| cast(draw(&mut rng, special)));
            let values: Vec<S> = (0..m * k).map(|_| cast(draw(&mut rng, special))).collect();
            let a = Array2::from_shape_vec((m, k).set_f(trial % 3 == 0), values).unwrap();
            let reference = Network::affine(theta.view(), a.view());
            Network::affine_into(theta.view(), a.view(), &mut z);
            assert!(
                same(&z, &reference),
                "trial {trial}: {z:?} vs {reference:?}"
            );
        }
    }

    #[test]
    fn affine_into_gives_the_matrix_products_bits() {
        agrees(|x| x);
        agrees(|x| x as f32);
        agrees(|x| Complex::new(x, 0.5 * x));
    }
}
