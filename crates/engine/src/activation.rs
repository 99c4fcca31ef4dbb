//! Activation functions and their backward step.
//!
//! Closed forms used (any calculus text): σ′ = σ(1 − σ), tanh′ = 1 − tanh², softplus′ = σ,
//! ELU′ = 1 for z > 0 and α·eᶻ otherwise. GELU is the tanh approximation of Hendrycks & Gimpel
//! (arXiv 1606.08415): ½·z·(1 + tanh(√(2/π)·(z + 0.044715·z³))). At a kink (z = 0 for ReLU-like
//! units) the derivative taken is the one from the left: 0 for ReLU, the slope for leaky ReLU, α for ELU.

use std::fmt;

use ndarray::{Array2, ArrayView2, Axis, Zip};

use crate::Scalar;

/// The largest |z + d| the logistic's difference form takes ([`Activation::change`]).
const LOGISTIC_RANGE: f64 = 64.0;

/// How near (relative to |z| + |d|) the kink a piecewise activation's changed value may come
/// before [`Activation::change`] leaves it to the plain path.
const KINK_NEAR: f64 = 1e-5;

/// √(2/π), the constant of the tanh form of GELU.
const GELU_C: f64 = 0.797_884_560_802_865_4;
/// The cubic coefficient of the tanh form of GELU.
const GELU_K: f64 = 0.044_715;

/// A layer's activation function.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Activation {
    Identity,
    Sigmoid,
    Tanh,
    Relu,
    /// max(z, slope·z) for 0 ≤ slope < 1.
    LeakyRelu {
        slope: f64,
    },
    /// z for z > 0, α·(eᶻ − 1) otherwise.
    Elu {
        alpha: f64,
    },
    Softplus,
    /// The tanh approximation (see the module doc).
    Gelu,
    /// Row-wise softmax; output layer only.
    Softmax,
}

impl Activation {
    /// Whether the activation's parameter is one it is defined for: `Err((what, value, rule))`
    /// names the parameter, its value and the rule it breaks (a leaky-relu slope in [0, 1), an
    /// elu alpha finite and > 0).
    pub fn check_parameter(&self) -> Result<(), (&'static str, f64, &'static str)> {
        match *self {
            Activation::LeakyRelu { slope }
                if !(slope.is_finite() && (0.0..1.0).contains(&slope)) =>
            {
                Err(("the leaky-relu slope", slope, "it must be ≥ 0 and < 1"))
            }
            Activation::Elu { alpha } if !(alpha.is_finite() && alpha > 0.0) => {
                Err(("the elu alpha", alpha, "it must be a finite number > 0"))
            }
            _ => Ok(()),
        }
    }

    /// The names a network description uses, in the order the docs list them.
    pub const NAMES: [&'static str; 9] = [
        "identity",
        "sigmoid",
        "tanh",
        "relu",
        "leaky-relu",
        "elu",
        "softplus",
        "gelu",
        "softmax",
    ];

    /// The description's name of this activation.
    pub fn name(&self) -> &'static str {
        match self {
            Activation::Identity => "identity",
            Activation::Sigmoid => "sigmoid",
            Activation::Tanh => "tanh",
            Activation::Relu => "relu",
            Activation::LeakyRelu { .. } => "leaky-relu",
            Activation::Elu { .. } => "elu",
            Activation::Softplus => "softplus",
            Activation::Gelu => "gelu",
            Activation::Softmax => "softmax",
        }
    }

    /// Where the function is not differentiable, if anywhere: a finite difference whose stencil
    /// straddles this pre-activation value is not to be trusted.
    pub fn kink(&self) -> Option<f64> {
        match *self {
            Activation::Relu => Some(0.0),
            Activation::LeakyRelu { slope } if slope != 1.0 => Some(0.0),
            Activation::Elu { alpha } if alpha != 1.0 => Some(0.0),
            _ => None,
        }
    }

    /// Where the function, or one of its first two derivatives, breaks: a kink, or (elu with α = 1,
    /// whose second derivative jumps from α to 0 at 0) a point where the finite-difference
    /// methods' error bounds, which assume smooth higher derivatives, do not hold.
    pub fn break_point(&self) -> Option<f64> {
        match *self {
            Activation::Elu { .. } => Some(0.0),
            _ => self.kink(),
        }
    }

    /// Whether any pair (now, was) of pre-activations lies on two sides of [`Self::break_point`]
    /// (a value on it counts as below): the kink test of a moved unit or channel, which the
    /// plain path ([`crate::graph::Graph::tail_crossed`]) and the response share.
    pub fn sides_change<'a, S: Scalar + 'a>(
        &self,
        mut pairs: impl Iterator<Item = (&'a S, &'a S)>,
    ) -> bool {
        self.break_point()
            .is_some_and(|k| pairs.any(|(a, b)| (a.re() > k) != (b.re() > k)))
    }

    /// Whether moving this activation's argument from `z` to `now` goes past `share` of the
    /// radius of convergence of its Taylor series about z: the distance from z to the nearest
    /// complex point where the function is not analytic (any complex-analysis text: tanh has
    /// poles at iπ(k + ½), so the radius is √(z² + (π/2)²); the logistic function's poles and
    /// softplus's branch points lie at iπ(2k + 1), √(z² + π²); gelu's come from tanh of its
    /// argument √(2/π)(z + 0.044715z³), taken there). A finite difference's error estimate
    /// assumes the loss is near its Taylor polynomial across the stencil; past a fair share of
    /// that radius a smooth unit acts as a kink at the step's scale (softplus or tanh with
    /// weights hundreds of times their usual scale in f32, whose step moves z by tens).
    /// Identity, relu, leaky relu and elu have no such point (elu below 0 is α(eᶻ − 1), entire;
    /// their kinks are [`Self::kink`]'s and [`Self::break_point`]'s); softmax's is the graph's
    /// to judge over a row. NaN is never past.
    pub fn bends(&self, z: f64, now: f64, share: f64) -> bool {
        let gelu = |v: f64| GELU_C * (v + GELU_K * v * v * v);
        let (from, to, pole) = match *self {
            Activation::Tanh => (z, now, std::f64::consts::FRAC_PI_2),
            Activation::Sigmoid | Activation::Softplus => (z, now, std::f64::consts::PI),
            Activation::Gelu => (gelu(z), gelu(now), std::f64::consts::FRAC_PI_2),
            _ => return false,
        };
        (to - from).abs() > share * from.hypot(pole)
    }

    /// g(z) for one element (not for softmax, which needs the whole row).
    #[inline]
    pub fn value<S: Scalar>(&self, z: S) -> S {
        match *self {
            Activation::Identity => z,
            Activation::Sigmoid => sigmoid(z),
            Activation::Tanh => z.tanh(),
            Activation::Relu => {
                if z.re() > 0.0 {
                    z
                } else {
                    S::zero()
                }
            }
            Activation::LeakyRelu { slope } => {
                if z.re() > 0.0 {
                    z
                } else {
                    S::from_f64(slope) * z
                }
            }
            Activation::Elu { alpha } => {
                if z.re() > 0.0 {
                    z
                } else {
                    S::from_f64(alpha) * z.exp_m1()
                }
            }
            Activation::Softplus => softplus(z),
            Activation::Gelu => {
                let t = gelu_tanh(z);
                S::from_f64(0.5) * z * (S::one() + t)
            }
            Activation::Softmax => panic!("softmax is applied row-wise, not per element"),
        }
    }

    /// The size of the terms [`Self::slope`] forms g′(z) from, in f64 (not for softmax): its
    /// rounding in a precision of unit roundoff u is a few u of this, not of g′. Where g′ is a
    /// small difference of larger terms — the logistic's a(1 − a) and tanh's 1 − a² at
    /// saturation, gelu's ½(1 + t) far below 0 — this is the larger terms' size (a(1 + a),
    /// 1 + a², ½(1 + |t|) + ½|z|(1 + t²)·|inner|): an f32 gradient through a unit at σ(12) has
    /// its slope 6e-6 right to about 1% only (1 − a loses all but two digits of a), and the
    /// verdict's allowance for the analytic side must say so. Elsewhere |g′|.
    pub fn slope_terms(&self, z: f64, a: f64) -> f64 {
        match *self {
            Activation::Sigmoid => a.abs() * (1.0 + a.abs()),
            Activation::Tanh => 1.0 + a * a,
            Activation::Gelu => {
                let t = gelu_tanh(z);
                let inner = GELU_C * (1.0 + 3.0 * GELU_K * z * z);
                0.5 * (1.0 + t.abs()) + 0.5 * z.abs() * (1.0 + t * t) * inner.abs()
            }
            _ => self.slope(z, a).abs(),
        }
    }

    /// g′(z) for one element, given a = g(z) as well (not for softmax).
    #[inline]
    pub fn slope<S: Scalar>(&self, z: S, a: S) -> S {
        match *self {
            Activation::Identity => S::one(),
            Activation::Sigmoid => a * (S::one() - a),
            Activation::Tanh => S::one() - a * a,
            Activation::Relu => {
                if z.re() > 0.0 {
                    S::one()
                } else {
                    S::zero()
                }
            }
            Activation::LeakyRelu { slope } => {
                if z.re() > 0.0 {
                    S::one()
                } else {
                    S::from_f64(slope)
                }
            }
            Activation::Elu { alpha } => {
                if z.re() > 0.0 {
                    S::one()
                } else {
                    S::from_f64(alpha) * z.exp()
                }
            }
            Activation::Softplus => sigmoid(z),
            Activation::Gelu => {
                let t = gelu_tanh(z);
                let half = S::from_f64(0.5);
                let inner = S::from_f64(GELU_C) * (S::one() + S::from_f64(3.0 * GELU_K) * z * z);
                half * (S::one() + t) + half * z * (S::one() - t * t) * inner
            }
            Activation::Softmax => panic!("softmax has a Jacobian, not a slope"),
        }
    }

    /// The change g(z + d) − g(z) from the base z and a = g(z), accurate to a few ulp of the
    /// change itself rather than of g (its relative error is at most [`Self::change_ulps`]
    /// units of rounding): a finite difference in f32 then errs in proportion to the step,
    /// not to the value. `None` where no such form is known here (gelu, softmax), where a
    /// piecewise activation changes side (a kink the check's kink test must see), or outside
    /// the ranges the bound is stated for. Identities used (any calculus text):
    /// tanh, the addition formula tanh(z + d) = (t + tanh d)/(1 + t·tanh d) with t = tanh z,
    /// so the change is tanh d·(1 − t²)/(1 + t·tanh d), and 1 − t² = sech² z = 4s/(1 + s)²,
    /// s = e^(−2|z|), formed from z so that it keeps its relative accuracy where t is near ±1;
    /// logistic, σ(z + d) − σ(z) = σ(z + d)·σ(−z)·(1 − e^(−d)); softplus,
    /// ln(1 + e^(z+d)) − ln(1 + eᶻ) = ln(1 + σ(z)·(e^d − 1)); elu below 0,
    /// α(e^(z+d) − eᶻ) = α·eᶻ·(e^d − 1); relu, leaky relu, elu above 0 and identity are linear
    /// on their side.
    #[inline]
    pub fn change<S: Scalar>(&self, z: S, a: S, d: S) -> Option<S> {
        let one = S::one();
        let half = 0.5;
        match *self {
            Activation::Identity => Some(d),
            Activation::Tanh => {
                let s = (S::from_f64(-2.0) * S::from_f64(z.re().abs())).exp();
                let one_s = one + s;
                tanh_change(a, S::from_f64(4.0) * s / (one_s * one_s), d)
            }
            Activation::Sigmoid => {
                if (z + d).re().abs() > LOGISTIC_RANGE {
                    return None;
                }
                Some(sigmoid(z + d) * sigmoid(-z) * -(-d).exp_m1())
            }
            Activation::Softplus => {
                let x = sigmoid(z) * d.exp_m1();
                if x.re().abs() > half {
                    return None;
                }
                Some(x.ln_1p())
            }
            Activation::Relu | Activation::LeakyRelu { .. } | Activation::Elu { .. } => {
                let above = z.re() > 0.0;
                let now = (z + d).re();
                // Within a hair of the kink another rounding of z + d (the plain path's) could
                // put it on the other side: that loss takes the plain path and its kink test.
                if (now > 0.0) != above || now.abs() <= KINK_NEAR * (z.re().abs() + d.re().abs()) {
                    return None;
                }
                Some(match *self {
                    _ if above => d,
                    Activation::Relu => S::zero(),
                    Activation::LeakyRelu { slope } => S::from_f64(slope) * d,
                    Activation::Elu { alpha } => S::from_f64(alpha) * z.exp() * d.exp_m1(),
                    _ => unreachable!("matched above"),
                })
            }
            Activation::Gelu | Activation::Softmax => None,
        }
    }

    /// [`Self::change`] with the slope g′(z) at the base given (`slope`, within u of its value:
    /// formed once per base value, in f64, and rounded), where the change's form reads it: tanh's
    /// 1 − t², which the form otherwise builds from e^(−2|z|) at every call. The same bound.
    #[inline]
    pub fn change_from<S: Scalar>(&self, z: S, a: S, slope: S, d: S) -> Option<S> {
        if *self != Activation::Tanh {
            return self.change(z, a, d);
        }
        tanh_change(a, slope, d)
    }

    /// The relative error of [`Self::change`], in units of rounding u = ε/2, for an exact d and
    /// base (what the base's own rounding adds is [`Self::curvature`]'s): the sum over its
    /// operations of their error (the engine's exp and tanh within 3 ulp, the C library's
    /// expm1 and log1p taken within 2) times their condition in the ranges `change` keeps to
    /// (|t·tanh d| ≤ ½, |σ(z)(e^d − 1)| ≤ ½: a condition of at most 2), with margin; the
    /// logistic's σ(z + d) adds the rounding of z + d, |z + d|·u ≤ 64u. Measured against libm
    /// in f64 over z in [−30, 30] and d from ±1e-7 to ±5 (crates/engine/tests/it/
    /// graph_difference.rs): tanh 5.5u, logistic 33u, softplus 3.8u, elu 3.2u — each stated at
    /// about twice or more. `None` where there is no difference form.
    pub fn change_ulps(&self) -> Option<f64> {
        match *self {
            Activation::Identity | Activation::Relu => Some(0.0),
            Activation::LeakyRelu { .. } => Some(2.0),
            Activation::Tanh => Some(12.0),
            Activation::Sigmoid => Some(32.0 + LOGISTIC_RANGE),
            Activation::Softplus => Some(12.0),
            Activation::Elu { .. } => Some(10.0),
            Activation::Gelu | Activation::Softmax => None,
        }
    }

    /// max |g′| over the real line: how far an error in z moves g(z).
    pub fn max_slope(&self) -> f64 {
        match *self {
            Activation::Sigmoid => 0.25,
            Activation::Elu { alpha } => alpha.max(1.0),
            Activation::Gelu => 1.13,
            _ => 1.0,
        }
    }

    /// max |g″/g′| over the real line (where g′ ≠ 0): how much a change's relative size moves
    /// per unit of error in the base z it starts from (tanh: 2|t| ≤ 2; logistic: |1 − 2σ| ≤ 1;
    /// softplus: 1 − σ ≤ 1; elu below 0: 1; the linear pieces: 0).
    pub fn curvature(&self) -> f64 {
        match *self {
            Activation::Tanh => 2.0,
            Activation::Sigmoid | Activation::Softplus | Activation::Elu { .. } => 1.0,
            _ => 0.0,
        }
    }

    /// a = g(z) for a batch of pre-activations (one sample per row).
    pub fn apply<S: Scalar>(&self, z: ArrayView2<S>) -> Array2<S> {
        if *self == Activation::Relu {
            // One pass that reads z and writes a, instead of a copy and a second pass over it
            // (17 MB each at a batch of 8,192); the select of `apply_values`.
            return z.mapv(|v| if v.re() > 0.0 { v } else { S::zero() });
        }
        let mut out = z.to_owned();
        self.apply_in_place(&mut out);
        out
    }

    /// z ← g(z) over some values of a batch (all of them for [`Activation::apply_in_place`]; the
    /// graph's channel-wise updates apply it to the channels that changed).
    /// Softmax reads whole rows: it has no element-wise form.
    pub fn apply_values<S: Scalar>(&self, z: &mut [S]) {
        // The common cases get a loop of their own, so the function inlines into it (and
        // vectorises) instead of a call and a match per element.
        match self {
            Activation::Softmax => panic!("softmax applies to whole rows, not to some values"),
            Activation::Tanh => S::tanh_all(z),
            Activation::Sigmoid => S::sigmoid_all(z),
            // A select, not a branch, so that the loop vectorises; NaN and -0 go to 0 as well.
            Activation::Relu => z
                .iter_mut()
                .for_each(|v| *v = if v.re() > 0.0 { *v } else { S::zero() }),
            Activation::Identity => {}
            act => z.iter_mut().for_each(|v| *v = act.value(*v)),
        }
    }

    /// z ← g(z), for a batch of pre-activations the caller no longer needs.
    pub fn apply_in_place<S: Scalar>(&self, z: &mut Array2<S>) {
        match self {
            Activation::Softmax => {
                for mut row in z.axis_iter_mut(Axis(0)) {
                    // Shift by the row's largest real part; any shift gives the same softmax.
                    let shift = row.iter().fold(f64::NEG_INFINITY, |acc, v| acc.max(v.re()));
                    let shift = S::from_f64(if shift.is_finite() { shift } else { 0.0 });
                    row.mapv_inplace(|v| v - shift);
                    match row.as_slice_mut() {
                        Some(values) => S::exp_all(values),
                        None => row.mapv_inplace(Scalar::exp),
                    }
                    let mut total = S::zero();
                    for v in row.iter() {
                        total += *v;
                    }
                    for v in row.iter_mut() {
                        *v = *v / total;
                    }
                }
            }
            act => match z.as_slice_mut() {
                Some(values) => act.apply_values(values),
                None => z.mapv_inplace(|v| act.value(v)),
            },
        }
    }

    /// The backward step through the activation: dJ/dz from dJ/da, given z and a = g(z).
    ///
    /// Element-wise functions multiply by g′(z); softmax applies its Jacobian row by row,
    /// dz = a ⊙ (da − ⟨da, a⟩).
    pub fn backward<S: Scalar>(
        &self,
        z: ArrayView2<S>,
        a: ArrayView2<S>,
        upstream: Array2<S>,
    ) -> Array2<S> {
        let mut out = upstream;
        match self {
            Activation::Identity => {}
            Activation::Softmax => {
                for (mut d, arow) in out.axis_iter_mut(Axis(0)).zip(a.axis_iter(Axis(0))) {
                    let mut dot = S::zero();
                    for (dv, av) in d.iter().zip(arow.iter()) {
                        dot += *dv * *av;
                    }
                    for (dv, av) in d.iter_mut().zip(arow.iter()) {
                        *dv = *av * (*dv - dot);
                    }
                }
            }
            // ReLU's, tanh's and the sigmoid's slopes in loops of their own (the same factors
            // as `slope`): a match per element kept the commonest backward steps from
            // vectorising.
            Activation::Relu => {
                Zip::from(&mut out).and(z).for_each(|d, &zv| {
                    *d *= if zv.re() > 0.0 { S::one() } else { S::zero() };
                });
            }
            Activation::Tanh => {
                Zip::from(&mut out)
                    .and(a)
                    .for_each(|d, &av| *d *= S::one() - av * av);
            }
            Activation::Sigmoid => {
                Zip::from(&mut out)
                    .and(a)
                    .for_each(|d, &av| *d *= av * (S::one() - av));
            }
            act => {
                Zip::from(&mut out)
                    .and(z)
                    .and(a)
                    .for_each(|d, &zv, &av| *d *= act.slope(zv, av));
            }
        }
        out
    }
}

impl fmt::Display for Activation {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Activation::LeakyRelu { slope } => write!(f, "leaky-relu (slope {slope})"),
            Activation::Elu { alpha } => write!(f, "elu (alpha {alpha})"),
            other => f.write_str(other.name()),
        }
    }
}

/// The logistic function, evaluated on the side that cannot overflow.
#[inline]
pub(crate) fn sigmoid<S: Scalar>(z: S) -> S {
    if z.re() >= 0.0 {
        S::one() / (S::one() + (-z).exp())
    } else {
        let e = z.exp();
        e / (S::one() + e)
    }
}

/// ln(1 + eᶻ), evaluated on the side that cannot overflow.
#[inline]
pub(crate) fn softplus<S: Scalar>(z: S) -> S {
    if z.re() > 0.0 {
        z + (-z).exp().ln_1p()
    } else {
        z.exp().ln_1p()
    }
}

#[inline]
fn gelu_tanh<S: Scalar>(z: S) -> S {
    (S::from_f64(GELU_C) * (z + S::from_f64(GELU_K) * z * z * z)).tanh()
}

/// tanh(z + d) − tanh(z) = tanh d · sech² z / (1 + tanh z · tanh d) (the tanh addition
/// formula), from a = tanh z and sech² z; `None` past |tanh z · tanh d| > ½, where the
/// denominator's condition passes 2.
fn tanh_change<S: Scalar>(a: S, sech2: S, d: S) -> Option<S> {
    let td = d.tanh();
    let p = a * td;
    if p.re().abs() > 0.5 {
        return None;
    }
    Some(td * sech2 / (S::one() + p))
}

#[cfg(test)]
mod tests {
    use super::*;

    // The slopes against central differences of the values: an internal consistency check of each
    // closed form (the independent check against num-dual lives in tests/it/dual.rs).
    #[test]
    fn slopes_match_central_differences_away_from_kinks() {
        let acts = [
            Activation::Identity,
            Activation::Sigmoid,
            Activation::Tanh,
            Activation::Relu,
            Activation::LeakyRelu { slope: 0.1 },
            Activation::Elu { alpha: 0.7 },
            Activation::Softplus,
            Activation::Gelu,
        ];
        for act in acts {
            for &z in &[-3.1f64, -0.8, -0.05, 0.05, 0.6, 2.9] {
                let h = 1e-6;
                let numeric = (act.value(z + h) - act.value(z - h)) / (2.0 * h);
                let analytic = act.slope(z, act.value(z));
                assert!(
                    (numeric - analytic).abs() < 1e-8,
                    "{act}: at {z}: {numeric} vs {analytic}"
                );
            }
        }
    }

    // Published values [pub: the logistic function, tanh and softplus are closed forms; numbers
    // computed here by std's exp/tanh]: σ(0) = ½, tanh(0) = 0, softplus(0) = ln 2, GELU(0) = 0.
    #[test]
    fn values_at_zero_are_the_closed_forms() {
        assert_eq!(Activation::Sigmoid.value(0.0), 0.5);
        assert_eq!(Activation::Tanh.value(0.0), 0.0);
        assert!((Activation::Softplus.value(0.0) - std::f64::consts::LN_2).abs() < 1e-16);
        assert_eq!(Activation::Gelu.value(0.0), 0.0);
    }

    // The slice loops of tanh and the sigmoid (elementary/, SIMD) against the per-element
    // `value`: the incremental paths mix the two, so they must agree bit for bit.
    #[test]
    fn slice_loops_give_the_bits_of_value() {
        let z: Vec<f64> = (0..1000)
            .map(|i| (f64::from(i) * 0.61).sin() * 40.0)
            .chain([0.0, -0.0, 800.0, -800.0, f64::NAN, f64::INFINITY, -1e-300])
            .collect();
        for act in [Activation::Sigmoid, Activation::Tanh] {
            let mut wide = z.clone();
            act.apply_values(&mut wide);
            let mut narrow: Vec<f32> = z.iter().map(|&v| v as f32).collect();
            let expected32: Vec<u32> = narrow.iter().map(|&v| act.value(v).to_bits()).collect();
            act.apply_values(&mut narrow);
            for (i, &v) in z.iter().enumerate() {
                assert_eq!(wide[i].to_bits(), act.value(v).to_bits(), "{act} at {v:e}");
                assert_eq!(narrow[i].to_bits(), expected32[i], "{act} f32 at {v:e}");
            }
        }
    }

    #[test]
    fn extreme_inputs_stay_finite() {
        for act in [Activation::Sigmoid, Activation::Softplus, Activation::Tanh] {
            for z in [-800.0f64, 800.0] {
                assert!(act.value(z).is_finite(), "{act} at {z}");
            }
        }
        let z = ndarray::array![[1000.0f64, 0.0, -1000.0]];
        let p = Activation::Softmax.apply(z.view());
        assert!((p[[0, 0]] - 1.0).abs() < 1e-15 && p.iter().all(|v| v.is_finite()));
    }
}
