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
/// overflows; 0 when that is not finite). The exponentials of a block of rows and then the
/// logarithms of their sums in one slice loop each, which the scalar can run wide; the blocks
/// live on the stack, so a check's many losses allocate nothing here. Blocks change no bit: the
/// slice loops give each value the same bits whatever the slice, and the total adds the terms
/// in row order as one sum.
fn softmax_cross_entropy<S: Scalar>(z: &[S], y: &[S], width: usize) -> S {
    /// Values and rows per block (a row wider than that gets a buffer of its own).
    const ROOM: usize = 256;
    const ROWS: usize = 32;
    let mut total = S::zero();
    if width == 0 {
        return total;
    }
    let (mut shifts, mut logs) = ([S::zero(); ROWS], [S::zero(); ROWS]);
    if width > ROOM {
        let mut exps = vec![S::zero(); width];
        for (zrow, yrow) in z.chunks_exact(width).zip(y.chunks_exact(width)) {
            let buffers = (&mut exps[..], &mut shifts[..1], &mut logs[..1]);
            cross_entropy_rows(zrow, yrow, width, buffers, &mut total);
        }
        return total;
    }
    // Whole vectors of rows where there is room (the slice loops' short tails are slower).
    let rows = (ROOM / width).min(ROWS);
    let block = if rows >= 8 { rows - rows % 8 } else { rows } * width;
    let mut exps = [S::zero(); ROOM];
    for (zb, yb) in z.chunks(block).zip(y.chunks(block)) {
        let rows = zb.len() / width;
        let buffers = (
            &mut exps[..zb.len()],
            &mut shifts[..rows],
            &mut logs[..rows],
        );
        cross_entropy_rows(zb, yb, width, buffers, &mut total);
    }
    total
}

/// [`softmax_cross_entropy`] of whole rows `z`, `y`, added to `total`, in buffers for the
/// exponentials (as many as z) and for each row's shift and logarithm.
fn cross_entropy_rows<S: Scalar>(
    z: &[S],
    y: &[S],
    width: usize,
    (exps, shifts, logs): (&mut [S], &mut [S], &mut [S]),
    total: &mut S,
) {
    for (row, shift) in z.chunks_exact(width).zip(shifts.iter_mut()) {
        let most = row.iter().fold(f64::NEG_INFINITY, |acc, v| acc.max(v.re()));
        *shift = S::from_f64(if most.is_finite() { most } else { 0.0 });
    }
    exps.copy_from_slice(z);
    for (row, &shift) in exps.chunks_exact_mut(width).zip(shifts.iter()) {
        row.iter_mut().for_each(|v| *v -= shift);
    }
    S::exp_all(exps);
    for (log, row) in logs.iter_mut().zip(exps.chunks_exact(width)) {
        *log = row.iter().fold(S::zero(), |acc, &e| acc + e);
    }
    S::ln_all(logs);
    let rows = z.chunks_exact(width).zip(y.chunks_exact(width));
    for ((zrow, yrow), (&shift, &log)) in rows.zip(shifts.iter().zip(logs.iter())) {
        let lse = shift + log;
        for (&zv, &yv) in zrow.iter().zip(yrow) {
            *total += yv * (lse - zv);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::Rng;

    /// The whole batch at once, as before blocks: shifts, every exponential, every row sum's
    /// logarithm, then the terms in row order.
    fn whole<S: Scalar>(z: &[S], y: &[S], width: usize) -> S {
        let shifts: Vec<S> = z
            .chunks_exact(width)
            .map(|row| {
                let most = row.iter().fold(f64::NEG_INFINITY, |acc, v| acc.max(v.re()));
                S::from_f64(if most.is_finite() { most } else { 0.0 })
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
        let mut total = S::zero();
        for (i, (zrow, yrow)) in z.chunks_exact(width).zip(y.chunks_exact(width)).enumerate() {
            let lse = shifts[i] + logs[i];
            for (&zv, &yv) in zrow.iter().zip(yrow) {
                total += yv * (lse - zv);
            }
        }
        total
    }

    #[test]
    fn blocks_of_rows_give_the_whole_batchs_bits_and_the_c_librarys_value() {
        let mut rng = Rng::new(7);
        for width in [1, 3, 8, 10, 33, 256, 257, 300] {
            for rows in [1, 7, 8, 25, 32, 70] {
                let z: Vec<f64> = (0..rows * width).map(|_| 4.0 * rng.normal()).collect();
                // One-hot and soft targets.
                let y: Vec<f64> = (0..rows * width)
                    .map(|i| match rows % 2 {
                        0 => (i % width == i / width % width) as u8 as f64,
                        _ => rng.uniform(),
                    })
                    .collect();
                let got = softmax_cross_entropy(&z, &y, width);
                let want = whole(&z, &y, width);
                assert_eq!(got.to_bits(), want.to_bits(), "width {width}, rows {rows}");
                let z32: Vec<f32> = z.iter().map(|&v| v as f32).collect();
                let y32: Vec<f32> = y.iter().map(|&v| v as f32).collect();
                let got = softmax_cross_entropy(&z32, &y32, width);
                assert_eq!(got.to_bits(), whole(&z32, &y32, width).to_bits());
                // The C library's exp and ln (std), summed plainly: within round-off.
                let mut reference = 0.0;
                let mut scale = 0.0;
                for (zrow, yrow) in z.chunks_exact(width).zip(y.chunks_exact(width)) {
                    let most = zrow.iter().fold(f64::NEG_INFINITY, |a, &v| a.max(v));
                    let lse = most + zrow.iter().map(|v| (v - most).exp()).sum::<f64>().ln();
                    for (&zv, &yv) in zrow.iter().zip(yrow) {
                        reference += yv * (lse - zv);
                        scale += (yv * (lse.abs() + zv.abs())).abs();
                    }
                }
                let allowed = 1e-14 * scale.max(1.0);
                let apart = (softmax_cross_entropy(&z, &y, width) - reference).abs();
                assert!(apart <= allowed, "width {width}, rows {rows}: {apart:e}");
            }
        }
    }
}
