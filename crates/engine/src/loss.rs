//! The data term of the loss, and its gradient with respect to the output pre-activations.
//!
//! Every loss is written below as a mean over the m samples of the batch (the default reduction);
//! under `reduction = "sum"` the 1/m factor is left out of the value and of dJ/dz.
//! - cross-entropy with softmax outputs (categorical): J = −(1/m) Σᵢ Σₖ yᵢₖ · ln pᵢₖ, computed as
//!   (1/m) Σᵢ Σₖ yᵢₖ · (lseᵢ − zᵢₖ) with a shifted log-sum-exp; dJ/dz = (p · Σₖ yₖ − y)/m, which is the
//!   familiar (p − y)/m when each row of y sums to one.
//! - cross-entropy with sigmoid outputs (binary, summed over output units):
//!   J = −(1/m) Σ [y ln σ(z) + (1 − y) ln(1 − σ(z))] = (1/m) Σ [softplus(z) − y·z]; dJ/dz = (a − y)/m.
//! - squared error: J = (1/2m) Σ ‖a − y‖²; dJ/dz = the activation's backward step applied to (a − y)/m.

use std::fmt;

use ndarray::{Array2, ArrayView2, Axis, Zip};

use crate::activation::softplus;
use crate::{Activation, Reduction, Scalar};

/// The data term of the loss.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Loss {
    CrossEntropy,
    SquaredError,
}

impl Loss {
    /// The names a network description uses.
    pub const NAMES: [&'static str; 2] = ["cross-entropy", "squared-error"];

    pub fn name(&self) -> &'static str {
        match self {
            Loss::CrossEntropy => "cross-entropy",
            Loss::SquaredError => "squared-error",
        }
    }

    /// Whether [`Loss::value`] reads the output activations a. Cross-entropy does not: it is
    /// computed from z (log-sum-exp, softplus), which is both stabler and cheaper.
    pub fn reads_activations(&self) -> bool {
        matches!(self, Loss::SquaredError)
    }

    /// Whether this loss is defined for that output activation.
    pub fn accepts(&self, output: Activation) -> bool {
        match self {
            Loss::CrossEntropy => matches!(output, Activation::Sigmoid | Activation::Softmax),
            Loss::SquaredError => true,
        }
    }

    /// The mean data loss of a batch, from the output pre-activations z and activations a (which
    /// may be empty when the loss does not [read](Loss::reads_activations) them).
    pub fn value<S: Scalar>(
        &self,
        output: Activation,
        z: ArrayView2<S>,
        a: ArrayView2<S>,
        y: ArrayView2<S>,
    ) -> S {
        self.value_with(Reduction::Mean, output, z, a, y)
    }

    /// The data loss of a batch under a reduction (see [`Loss::value`]).
    pub fn value_with<S: Scalar>(
        &self,
        reduction: Reduction,
        output: Activation,
        z: ArrayView2<S>,
        a: ArrayView2<S>,
        y: ArrayView2<S>,
    ) -> S {
        let mut total = S::zero();
        match (self, output) {
            (Loss::CrossEntropy, Activation::Softmax) => {
                assert_eq!(z.dim(), y.dim(), "one target per output");
                let width = z.ncols();
                let (z, y) = (z.as_standard_layout(), y.as_standard_layout());
                let (z, y) = (z.as_slice(), y.as_slice());
                let (z, y) = (z.expect("standard layout"), y.expect("standard layout"));
                total = softmax_cross_entropy(z, y, width);
            }
            (Loss::CrossEntropy, Activation::Sigmoid) => {
                Zip::from(z)
                    .and(y)
                    .for_each(|&zv, &yv| total += softplus(zv) - yv * zv);
            }
            (Loss::CrossEntropy, other) => {
                panic!("cross-entropy is not defined for {other} outputs (checked at construction)")
            }
            (Loss::SquaredError, _) => {
                assert_eq!(a.dim(), y.dim(), "squared error needs the activations");
                Zip::from(a).and(y).for_each(|&av, &yv| {
                    let d = av - yv;
                    total += d * d;
                });
                total *= S::from_f64(0.5);
            }
        }
        match reduction {
            Reduction::Mean => total / S::from_f64(z.nrows() as f64),
            Reduction::Sum => total,
        }
    }

    /// dJ/dz for the output layer: the start of backpropagation.
    pub fn output_delta<S: Scalar>(
        &self,
        output: Activation,
        z: ArrayView2<S>,
        a: ArrayView2<S>,
        y: ArrayView2<S>,
    ) -> Array2<S> {
        self.output_delta_with(Reduction::Mean, output, z, a, y)
    }

    /// dJ/dz for the output layer under a reduction (see [`Loss::output_delta`]).
    pub fn output_delta_with<S: Scalar>(
        &self,
        reduction: Reduction,
        output: Activation,
        z: ArrayView2<S>,
        a: ArrayView2<S>,
        y: ArrayView2<S>,
    ) -> Array2<S> {
        let inv_m = S::from_f64(reduction.factor(z.nrows()));
        match (self, output) {
            (Loss::CrossEntropy, Activation::Softmax) => {
                let mut d = Array2::zeros(a.raw_dim());
                for ((mut drow, arow), yrow) in d
                    .axis_iter_mut(Axis(0))
                    .zip(a.axis_iter(Axis(0)))
                    .zip(y.axis_iter(Axis(0)))
                {
                    let mass = yrow.iter().fold(S::zero(), |acc, &v| acc + v);
                    Zip::from(&mut drow)
                        .and(arow)
                        .and(yrow)
                        .for_each(|dv, &av, &yv| *dv = (av * mass - yv) * inv_m);
                }
                d
            }
            (Loss::CrossEntropy, _) => {
                let mut d = a.to_owned();
                Zip::from(&mut d)
                    .and(y)
                    .for_each(|dv, &yv| *dv = (*dv - yv) * inv_m);
                d
            }
            (Loss::SquaredError, act) => {
                let mut d = a.to_owned();
                Zip::from(&mut d)
                    .and(y)
                    .for_each(|dv, &yv| *dv = (*dv - yv) * inv_m);
                act.backward(z, a, d)
            }
        }
    }
}

impl fmt::Display for Loss {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// Σᵢ Σₖ yᵢₖ · (lseᵢ − zᵢₖ) over rows of `width` values, lseᵢ = ln Σₖ e^zᵢₖ computed as
/// shift + ln Σₖ e^(zᵢₖ − shift), the shift the row's largest real part (so that nothing
/// overflows; 0 when that is not finite). The exponentials of all rows and then the logarithms
/// of all sums in one slice loop each, which the scalar can run wide.
fn softmax_cross_entropy<S: Scalar>(z: &[S], y: &[S], width: usize) -> S {
    let mut total = S::zero();
    if width == 0 {
        return total;
    }
    let shifts: Vec<S> = z
        .chunks_exact(width)
        .map(|row| {
            let shift = row.iter().fold(f64::NEG_INFINITY, |acc, v| acc.max(v.re()));
            S::from_f64(if shift.is_finite() { shift } else { 0.0 })
        })
        .collect();
    let mut exps = z.to_vec();
    for (row, &shift) in exps.chunks_exact_mut(width).zip(&shifts) {
        row.iter_mut().for_each(|v| *v -= shift);
    }
    S::exp_all(&mut exps);
    let mut logs: Vec<S> = exps
        .chunks_exact(width)
        .map(|row| row.iter().fold(S::zero(), |acc, &e| acc + e))
        .collect();
    S::ln_all(&mut logs);
    for (((zrow, yrow), &shift), &log) in z
        .chunks_exact(width)
        .zip(y.chunks_exact(width))
        .zip(&shifts)
        .zip(&logs)
    {
        let lse = shift + log;
        for (&zv, &yv) in zrow.iter().zip(yrow) {
            total += yv * (lse - zv);
        }
    }
    total
}
