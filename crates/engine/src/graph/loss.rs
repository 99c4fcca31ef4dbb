//! The loss under the description's conventions (DESIGN §4.1): the data term (cross-entropy or
//! squared error, `reduction` mean or sum) and the L2 term (λ / divisor) · Σ w² over the tensors
//! that decay.
//!
//! The data term treats each sample's last axis as one output vector: a sequence output is steps
//! vectors per sample, and `mean` averages over samples and steps. The L2 divisor's m stays the
//! number of samples.

use ndarray::{Array2, ArrayView2};

use crate::{Activation, L2Divisor, Loss, Reduction, Scalar};

/// The loss and its conventions: everything of the description's top level the engine needs.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct LossConfig {
    pub loss: Loss,
    pub reduction: Reduction,
    /// λ ≥ 0.
    pub l2: f64,
    pub l2_divisor: L2Divisor,
    /// Whether biases decay too (never scales, shifts or tables).
    pub l2_on_bias: bool,
}

impl LossConfig {
    /// Cross-entropy, mean, no L2: the description's defaults with that loss.
    pub fn cross_entropy() -> Self {
        LossConfig {
            loss: Loss::CrossEntropy,
            reduction: Reduction::Mean,
            l2: 0.0,
            l2_divisor: L2Divisor::TwoM,
            l2_on_bias: false,
        }
    }

    /// Squared error, mean, no L2.
    pub fn squared_error() -> Self {
        LossConfig {
            loss: Loss::SquaredError,
            ..LossConfig::cross_entropy()
        }
    }

    /// λ / divisor for a batch of m samples: the L2 term is this times Σ w².
    pub fn l2_factor(&self, m: usize) -> f64 {
        self.l2 / self.l2_divisor.value(m)
    }

    /// The data term from the output layer's pre-activation z and activation a (m × size, `rows`
    /// output vectors per sample).
    pub(crate) fn data<S: Scalar>(
        &self,
        output: Activation,
        rows: usize,
        z: ArrayView2<S>,
        a: ArrayView2<S>,
        y: ArrayView2<S>,
    ) -> S {
        let n = z.nrows() * rows;
        let (z, a, y) = (by_rows(z, n), by_rows(a, n), by_rows(y, n));
        let mean = self.loss.value(output, z, a, y);
        match self.reduction {
            Reduction::Mean => mean,
            Reduction::Sum => mean * S::from_f64(n as f64),
        }
    }

    /// dJ/dz of the data term for the output layer.
    pub(crate) fn delta<S: Scalar>(
        &self,
        output: Activation,
        rows: usize,
        z: ArrayView2<S>,
        a: ArrayView2<S>,
        y: ArrayView2<S>,
    ) -> Array2<S> {
        let (m, size) = z.dim();
        let n = m * rows;
        let mut d = self
            .loss
            .output_delta(output, by_rows(z, n), by_rows(a, n), by_rows(y, n));
        if self.reduction == Reduction::Sum {
            d.mapv_inplace(|v| v * S::from_f64(n as f64));
        }
        super::reshape(d, (m, size))
    }
}

/// An m × size batch seen as n rows of one output vector each.
pub(crate) fn by_rows<S>(x: ArrayView2<S>, n: usize) -> ArrayView2<S> {
    let total = x.len();
    x.into_shape_with_order((n, total / n.max(1)))
        .expect("batches are standard layout")
}

/// γ(n) = n·u / (1 − n·u), Higham (Accuracy and Stability of Numerical Algorithms, §3.1): a sum
/// or dot product of n terms in a precision of unit roundoff u errs by at most γ(n) times the
/// sum of the terms' absolute values.
#[inline]
pub(crate) fn gamma(n: usize, u: f64) -> f64 {
    let nu = n as f64 * u;
    nu / (1.0 - nu)
}

/// What [`LossConfig::data_change`] reads of the base point: the output layer's z and a, and
/// (for a softmax) its probabilities, each m × outputs in sample rows, with the largest
/// error of the base's z against exact arithmetic (`base_error`).
pub(crate) struct OutputBase<'a, S> {
    pub z: &'a [S],
    pub a: &'a [S],
    pub p: &'a [S],
    pub y: &'a [S],
    /// Per value, |Σy·p_c − y_c| (with margin for its own rounding): the softmax
    /// cross-entropy's slope in z at the base; empty for another output.
    pub slopes: &'a [f64],
    /// Per sample, Σ_c y_c (summed in f64, rounded once) and Σ_c |y_c| (softmax only).
    pub ysums: &'a [(S, f64)],
    pub base_error: f64,
}

/// The errors of a top change's values ([`LossConfig::data_change`]).
pub(crate) enum Errors<'a> {
    /// A bound per value (m × outputs, sample rows).
    Values(&'a [f64]),
    /// Per sample, for a softmax only: Σ_c |Σy·p_c − y_c|·e_c (`OutputBase::slopes` times each
    /// value's bound) and the largest e_c — all that its bound reads of them.
    Samples(&'a [(f64, f64)]),
}

impl LossConfig {
    /// The change of the data term (reduction applied) when the output layer's z moves by `dz`
    /// (m × outputs, sample rows), computed as a change (never as the difference of two
    /// losses), with a bound on its error: `err` bounds the error of dz's values. Identities (any calculus text): softmax cross-entropy per sample,
    /// (Σ_c y_c)·ln(1 + Σ_c p_c(e^(dz_c) − 1)) − Σ_c y_c·dz_c, from log-sum-exp's change
    /// ln Σ_c p_c·e^(dz_c); logistic cross-entropy per value, softplus's change (from
    /// [`Activation::change`]) − y·dz; squared error per value, ½((a + δa − y)² − (a − y)²) =
    /// δa·(a − y + δa/2) with δa the output activation's change. The bound sums, per
    /// operation, its rounding (u each, γ(n) for a sum of n terms, Higham §3.1) times the
    /// magnitude it acts on, the error of dz times the loss's largest slope in it
    /// (softmax: |Σy| + Σ|y|), and the base's error in z times the sensitivity of the
    /// probabilities (2 per unit) or slopes ([`Activation::curvature`]). `None` for a
    /// sequence output, an output or loss without a difference form, or past the ranges
    /// where the bound holds (|Σ p(e^dz − 1)| ≤ ½). `grown` is a buffer it may use. For real
    /// scalars (f32, f64): the samples' changes are summed in f64 from their real parts.
    pub(crate) fn data_change<S: Scalar>(
        &self,
        output: Activation,
        outputs: usize,
        base: &OutputBase<'_, S>,
        dz: &[S],
        err: Errors<'_>,
        grown: &mut Vec<S>,
    ) -> Option<(S, f64)> {
        let u = S::epsilon() / 2.0;
        let o = outputs;
        let m = dz.len() / o.max(1);
        let softmax = (self.loss, output) == (Loss::CrossEntropy, Activation::Softmax);
        // The samples' changes summed in f64 (each widened exactly): they cancel, so that in S
        // the sum's γ(m) of their magnitudes was most of a change's bound at a batch of 32,
        // and kept all but 242 of 1,800 coordinates off one step at 256.
        let sums = match err {
            Errors::Samples(per) if softmax => softmax_sums(base, dz, per, grown, o, u)?,
            Errors::Values(v) if softmax => {
                let per: Vec<(f64, f64)> = v
                    .chunks_exact(o)
                    .zip(base.slopes.chunks_exact(o))
                    .map(|(e, s0)| {
                        let along: f64 = e.iter().zip(s0).map(|(e, s)| e * s).sum();
                        (along, e.iter().fold(0.0f64, |m, &e| m.max(e)))
                    })
                    .collect();
                softmax_sums(base, dz, &per, grown, o, u)?
            }
            Errors::Values(v) => self.value_sums(output, o, base, dz, v, u)?,
            Errors::Samples(_) => return None,
        };
        let Sums {
            total,
            gross,
            bound,
        } = sums;
        let r = self.reduction.factor(m);
        let total = S::from_f64(total * r);
        // The f64 sum and product within γ(m + 1) in f64 of their terms; one rounding to S.
        let wide = gamma(m + 1, f64::EPSILON / 2.0);
        let bound = r * (bound + wide * gross) + u * total.re().abs() * (1.0 + wide);
        Some((total, bound))
    }

    /// [`LossConfig::data_change`]'s sums over samples for a logistic cross-entropy or a
    /// squared error, value by value: each value's change and its bound, `values` the errors
    /// of dz's values.
    fn value_sums<S: Scalar>(
        &self,
        output: Activation,
        o: usize,
        base: &OutputBase<'_, S>,
        dz: &[S],
        values: &[f64],
        u: f64,
    ) -> Option<Sums> {
        let mut sums = Sums::default();
        for (n, (dzr, yr)) in dz.chunks_exact(o).zip(base.y.chunks_exact(o)).enumerate() {
            let at = n * o..(n + 1) * o;
            let (change, b) = match (self.loss, output) {
                (Loss::CrossEntropy, Activation::Sigmoid) => {
                    let (mut c, mut b, mut g) = (S::zero(), 0.0, 0.0);
                    let er = &values[at.clone()];
                    for (((&z, &d), &y), &e) in base.z[at].iter().zip(dzr).zip(yr).zip(er) {
                        let sp = Activation::Softplus.change(z, z, d)?;
                        let v = sp - y * d;
                        let ulps = Activation::Softplus.change_ulps()? + 4.0;
                        b += sp.re().abs() * (ulps * u + base.base_error)
                            + 2.0 * u * (y * d).re().abs()
                            + (1.0 + y.re().abs()) * e
                            + u * v.re().abs();
                        g += v.re().abs();
                        c += v;
                    }
                    (c, b + gamma(o, u) * g)
                }
                (Loss::SquaredError, act) => {
                    let ulps = act.change_ulps()?;
                    let slope = act.max_slope();
                    let (mut c, mut b, mut g) = (S::zero(), 0.0, 0.0);
                    let er = &values[at.clone()];
                    let base_values = base.z[at.clone()].iter().zip(&base.a[at]);
                    for ((((&z, &a), &d), &y), &e) in base_values.zip(dzr).zip(yr).zip(er) {
                        let da = act.change(z, a, d)?;
                        let v = da * (a - y + S::from_f64(0.5) * da);
                        let (dar, gap) = (da.re().abs(), (a - y).re().abs());
                        let rel = (ulps + 4.0) * u + act.curvature() * base.base_error;
                        b += v.re().abs() * rel
                            + dar * (2.0 * u * (a.re().abs() + y.re().abs()))
                            + dar * slope * base.base_error
                            + (gap + dar) * slope * e * (1.0 + rel);
                        g += v.re().abs();
                        c += v;
                    }
                    (c, b + gamma(o, u) * g)
                }
                _ => return None,
            };
            sums.gross += change.re().abs();
            sums.bound += b;
            sums.total += change.re();
        }
        Some(sums)
    }
}

/// How many samples [`softmax_block`] takes together.
const LANES: usize = 8;

/// The running sums of [`LossConfig::data_change`] over samples, in f64 and in sample order.
#[derive(Default)]
struct Sums {
    total: f64,
    gross: f64,
    bound: f64,
}

/// [`LossConfig::data_change`]'s sums over samples for a softmax cross-entropy, in blocks of
/// [`LANES`] samples ([`softmax_block`]); `samples` is each sample's error figures
/// ([`Errors::Samples`]), `grown` a buffer.
fn softmax_sums<S: Scalar>(
    base: &OutputBase<'_, S>,
    dz: &[S],
    samples: &[(f64, f64)],
    grown: &mut Vec<S>,
    o: usize,
    u: f64,
) -> Option<Sums> {
    let mut sums = Sums::default();
    // p·(e^dz − 1) of every value first, in one loop the compiler can vectorise (the
    // series of [`expm1`] where every |dz| allows it), then blocks of samples. The
    // largest |dz| in lanes (a NaN left out), so that it vectorises too.
    let mut lanes = [0.0f64; LANES];
    for block in dz.chunks(LANES) {
        for (m, d) in lanes.iter_mut().zip(block) {
            let r = d.re().abs();
            *m = if r > *m { r } else { *m };
        }
    }
    let widest = lanes.iter().fold(0.0f64, |m, &r| m.max(r));
    let small = S::epsilon() > 1e-10 && widest <= 0.5;
    grown.clear();
    grown.reserve(dz.len());
    if small && widest <= 1.0 / 64.0 {
        grown.extend(base.p.iter().zip(dz).map(|(&p, &d)| p * expm1_short(d)));
    } else if small {
        grown.extend(base.p.iter().zip(dz).map(|(&p, &d)| p * expm1_series(d)));
    } else {
        grown.extend(base.p.iter().zip(dz).map(|(&p, &d)| p * expm1(d)));
    }
    let rows = LANES * o;
    let blocks = grown
        .chunks(rows)
        .zip(dz.chunks(rows))
        .zip(base.y.chunks(rows));
    let lanes = base.ysums.chunks(LANES).zip(samples.chunks(LANES));
    for (((t, d), y), (ys, e)) in blocks.zip(lanes) {
        softmax_block(t, d, y, ys, e, base.base_error, u, &mut sums)?;
    }
    Some(sums)
}

/// The changes of a softmax cross-entropy and their bounds for a block of up to [`LANES`]
/// samples (rows of `grown`, `dz` and `y`), added to `sums` in sample order; `None` past the
/// form's range in any of them. `grown` holds p_c·(e^(dz_c) − 1); `ysums` Σy (rounded once)
/// and Σ|y| per sample; `errors` Σ_c |Σy·p_c − y_c|·e_c and the largest e_c
/// ([`Errors::Samples`]). The block's samples go through each stage side by side: one sample
/// at a time, its sums and its ln(1 + s) were chains of dependent operations, most of an f32
/// check's time. Each sample's arithmetic is the same as alone, so results do not depend on
/// the block.
#[allow(clippy::too_many_arguments)]
fn softmax_block<S: Scalar>(
    grown: &[S],
    dz: &[S],
    y: &[S],
    ysums: &[(S, f64)],
    errors: &[(f64, f64)],
    base: f64,
    u: f64,
    sums: &mut Sums,
) -> Option<()> {
    let k = ysums.len();
    let o = dz.len() / k.max(1);
    // Lanes past k stay zero: their changes and bounds are zero and are not added.
    let (mut s, mut yd) = ([S::zero(); LANES], [S::zero(); LANES]);
    let (mut gs, mut gyd) = ([S::zero(); LANES], [S::zero(); LANES]);
    let (mut sy, mut gy) = ([S::zero(); LANES], [0.0f64; LANES]);
    let (mut along, mut most_err) = ([0.0f64; LANES], [0.0f64; LANES]);
    let rows = grown
        .chunks_exact(o)
        .zip(dz.chunks_exact(o))
        .zip(y.chunks_exact(o));
    for (j, ((t, d), y)) in rows.enumerate() {
        for ((&t, &d), &yc) in t.iter().zip(d).zip(y) {
            s[j] += t;
            gs[j] += S::from_f64(t.re().abs());
            let v = yc * d;
            yd[j] += v;
            gyd[j] += S::from_f64(v.re().abs());
        }
        (sy[j], gy[j]) = ysums[j];
        (along[j], most_err[j]) = errors[j];
    }
    // Sums of magnitudes, each within γ(o) of its value: taken that much larger.
    let g = gamma(o + 1, u);
    let up = 1.0 + 2.0 * g;
    // (A NaN error fails the comparison and takes the plain path too.)
    let outside = |j: usize| {
        let e = most_err[j];
        s[j].re().abs() > 0.5 || e.is_nan() || along[j].is_nan() || e > 0.125
    };
    if (0..LANES).any(outside) {
        return None;
    }
    let mut l = [S::zero(); LANES];
    ln1p_all(&s, &mut l);
    let mut change = [S::zero(); LANES];
    let mut bound = [0.0f64; LANES];
    for j in 0..LANES {
        let (sy, gy, along, most_err) = (sy[j], gy[j], along[j], most_err[j]);
        let (gs, gyd) = (gs[j].re() * up, gyd[j].re() * up);
        let sr = s[j].re().abs();
        change[j] = sy * l[j] - yd[j];
        // The data term's slope in dz_c between the computed and the exact dz is Σy·q_c − y_c, q
        // the probabilities there: q_c = p_c·e^(dz_c)/(1 + s) at the computed dz, so
        // Σ_c|q_c − p_c| ≤ (Σ_c p_c|e^(dz_c) − 1| + |s|)/(1 − |s|) (Σp = 1), and across the
        // error q moves by at most 3e of itself more (e ≤ 1/8). An error e_c in each dz_c moves
        // the change by at most Σ_c |Σy·p_c − y_c|·e_c + |Σy|·e·(Σ_c|q_c − p_c| + 3e·Σ_c q_c),
        // e the largest e_c.
        // 1/(1 − |s|) ≤ 1 + 2|s| for |s| ≤ ½.
        let shift = (gs * (1.0 + 16.0 * u) + sr) * (1.0 + 2.0 * sr);
        let syr = sy.re().abs();
        let moved = along + syr * most_err * (shift + 3.0 * most_err * (1.0 + shift) * 1.01);
        // Each p·(e^d − 1) within 14u (p rounded once, [`expm1`] within 12u, the product), their
        // sum within γ(o) of Σ|p(e^d − 1)|; the base's error in z moves each p by 2·base
        // relative; ln(1 + s) ([`ln1p`]) adds 4u of itself and at most twice the error of s
        // (|s| ≤ ½).
        let ds = (14.0 * u + g + 2.0 * base) * gs;
        let lr = l[j].re().abs();
        bound[j] = syr * (4.0 * u * lr + 2.0 * ds)
            + g * gy * lr
            + u * syr * lr
            + g * gyd
            + 2.0 * u * change[j].re().abs()
            + moved * (1.0 + 4.0 * u);
    }
    for j in 0..k {
        sums.gross += change[j].re().abs();
        sums.bound += bound[j];
        sums.total += change[j].re();
    }
    Some(())
}

/// e^d − 1 within 12 units of rounding of itself: in a precision coarser than f64, Taylor's
/// series to d⁹ for |d| ≤ ½ (its remainder below 2⁻²⁸ of the value; Horner's form within a few
/// u), and e^d − 1 from the engine's exp beyond (within 1 ulp of e^d, which is at most
/// 1.7·e^d/|e^d − 1| ≤ 5 ulp of the difference there); the C library's expm1 in f64. The
/// loss's loop of changes calls it once per output, where the C library's f32 expm1 took a
/// third of the check's time.
#[inline]
pub(crate) fn expm1<S: Scalar>(d: S) -> S {
    if S::epsilon() < 1e-10 {
        return d.exp_m1();
    }
    if d.re().abs() > 0.5 {
        return d.exp() - S::one();
    }
    expm1_series(d)
}

/// ln(1 + s) within 4 units of rounding of itself: in a precision coarser than f64, the
/// alternating series s − s²/2 + … to s⁸ for |s| ≤ 1/16 (its remainder below 2⁻³¹ of the
/// value; Horner's form within 3u), the C library's log1p otherwise.
#[inline]
pub(crate) fn ln1p<S: Scalar>(s: S) -> S {
    if S::epsilon() < 1e-10 || s.re().abs() > 0.0625 {
        return s.ln_1p();
    }
    let mut acc = S::from_f64(-1.0 / 8.0);
    for k in (2..=7).rev() {
        let c = if k % 2 == 0 { -1.0 } else { 1.0 } / k as f64;
        acc = S::from_f64(c) + s * acc;
    }
    s + s * (s * acc)
}

/// [`ln1p`] of every value of `s` into `l`: where all of them take the series, lane by lane
/// so that the compiler can vectorise it (the same operations as [`ln1p`] on each).
#[inline]
fn ln1p_all<S: Scalar>(s: &[S], l: &mut [S]) {
    // (A NaN takes [`ln1p`] too, as it would alone.)
    let series = s.iter().all(|v| v.re().abs() <= 0.0625);
    if S::epsilon() < 1e-10 || !series {
        for (l, &s) in l.iter_mut().zip(s) {
            *l = ln1p(s);
        }
        return;
    }
    l.fill(S::from_f64(-1.0 / 8.0));
    for k in (2..=7).rev() {
        let c = S::from_f64(if k % 2 == 0 { -1.0 } else { 1.0 } / k as f64);
        for (acc, &s) in l.iter_mut().zip(s) {
            *acc = c + s * *acc;
        }
    }
    for (acc, &s) in l.iter_mut().zip(s) {
        *acc = s + s * (s * *acc);
    }
}

/// [`expm1`]'s series to d⁵ for |d| ≤ 1/64 in a precision coarser than f64: its remainder is
/// below d⁵/120·1.01, under 2⁻³¹ of the value (the loss's usual changes of z are ~1e-3).
#[inline]
fn expm1_short<S: Scalar>(d: S) -> S {
    let c = S::from_f64;
    d + d * (d * (c(0.5) + d * (c(1.0 / 6.0) + d * (c(1.0 / 24.0) + d * c(1.0 / 120.0)))))
}

/// [`expm1`]'s series, for |d| ≤ ½ in a precision coarser than f64.
#[inline]
fn expm1_series<S: Scalar>(d: S) -> S {
    const C: [f64; 8] = [
        1.0 / 2.0,
        1.0 / 6.0,
        1.0 / 24.0,
        1.0 / 120.0,
        1.0 / 720.0,
        1.0 / 5040.0,
        1.0 / 40320.0,
        1.0 / 362880.0,
    ];
    let mut acc = S::from_f64(C[7]);
    for &c in C[..7].iter().rev() {
        acc = S::from_f64(c) + d * acc;
    }
    d + d * (d * acc)
}

#[cfg(test)]
mod tests {
    use super::expm1;

    // [C library: Rust's f64::exp_m1 calls libm's expm1] The f32 expm1 within its stated 12u
    // of libm's f64 expm1 at the same f32 argument, from 1e-30 to 20 in both signs.
    #[test]
    fn expm1_short_in_f32_is_within_its_ulps_of_libm() {
        let u = f32::EPSILON as f64 / 2.0;
        let mut x = 1e-30f32;
        while x <= 1.0 / 64.0 {
            for d in [x, -x] {
                let want = (d as f64).exp_m1();
                let off = (super::expm1_short(d) as f64 - want).abs() / want.abs() / u;
                assert!(off <= 12.0, "expm1_short({d}): {off:.1} u off");
            }
            x *= 1.01;
        }
    }

    #[test]
    fn expm1_in_f32_is_within_its_ulps_of_libm() {
        let u = f32::EPSILON as f64 / 2.0;
        let mut worst = 0.0f64;
        let mut x = 1e-30f32;
        while x < 20.0 {
            for d in [x, -x] {
                let want = (d as f64).exp_m1();
                let off = (expm1(d) as f64 - want).abs() / want.abs() / u;
                assert!(off <= 12.0, "expm1({d}): {off:.1} u off");
                worst = worst.max(off);
            }
            x *= 1.01;
        }
        assert!(worst > 0.0, "compared something");
    }

    // [C library: Rust's f64::ln_1p calls libm's log1p] The f32 ln1p within its stated 4u of
    // libm's f64 log1p at the same f32 argument, from 1e-30 to 0.4 in both signs.
    #[test]
    fn ln1p_in_f32_is_within_its_ulps_of_libm() {
        let u = f32::EPSILON as f64 / 2.0;
        let mut x = 1e-30f32;
        while x < 0.4 {
            for s in [x, -x] {
                let want = (s as f64).ln_1p();
                let off = (super::ln1p(s) as f64 - want).abs() / want.abs() / u;
                assert!(off <= 4.0, "ln1p({s}): {off:.1} u off");
            }
            x *= 1.01;
        }
    }
}
