//! tanh, eˣ, ln and the logistic function in f64.
//!
//! Both rest on one identity: with R(r) = r·coth(r/2), an even function of r,
//! eʳ = (R + r)/(R − r), so eʳ − 1 = 2r/(R − r). R's series, 2 + Σₙ 2·B₂ₙ·r²ⁿ/(2n)! (B the
//! Bernoulli numbers), shrinks by about (r/2π)² a term: for |r| ≤ ln 2 / 2 six terms after the 2
//! reach double precision, where the Taylor series of eʳ − 1 needed fourteen. The argument is
//! reduced as u = k·ln 2 + r and 2ᵏ put back by its bits.
//!
//! tanh(x) = (eᵘ − 1)/(eᵘ + 1) with u = 2|x|; with eᵘ = 2ᵏ(R + r)/(R − r) that is one quotient,
//! ((2ᵏ − 1)R + (2ᵏ + 1)r) / ((2ᵏ + 1)R + (2ᵏ − 1)r), where eᵘ − 1 and then e/(e + 2) took two
//! divisions and fourteen terms.

/// ln 2 split so that k·LN2_HI is exact for |k| < 2²¹ (LN2_HI has 21 trailing zero bits), and
/// LN2_HI + LN2_LO = ln 2 to about 1e-27. The split is the one of the freely distributable fdlibm
/// library; its values are checked in the tests below.
const LN2_HI: f64 = 0.693_147_180_369_123_8; // 0x3fe62e42fee00000
const LN2_LO: f64 = 1.908_214_929_270_587_7e-10; // 0x3dea39ef35793c76

/// 1.5 · 2⁵²: adding it to a number of magnitude below 2⁵¹ rounds that number to an integer, held
/// in the low bits of the sum.
const SHIFT: f64 = 6_755_399_441_055_744.0;

/// The coefficients of R(r) = r·coth(r/2) = 2 + Σₙ cₙ·r²ⁿ, cₙ = 2·B₂ₙ/(2n)! for n = 1..=7, from
/// B₂ … B₁₄ = 1/6, −1/30, 1/42, −1/30, 5/66, −691/2730, 7/6 (checked in the tests against the
/// Bernoulli numbers' recurrence and against r / tanh(r/2)).
const R_SERIES: [f64; 7] = [
    1.0 / 6.0,
    -1.0 / 360.0,
    1.0 / 15_120.0,
    -1.0 / 604_800.0,
    1.0 / 23_950_080.0,
    -691.0 / 653_837_184_000.0,
    1.0 / 37_362_124_800.0,
];

/// u = k·ln 2 + r with k = round(u / ln 2 − `offset`), so r / ln 2 ∈ [−½ − offset, ½ − offset]
/// (to rounding), for |u| < 2⁵⁰; k is returned as an integer.
#[inline(always)]
fn reduce(u: f64, offset: f64) -> (f64, i64) {
    let shifted = (u * std::f64::consts::LOG2_E - offset) + SHIFT;
    let k = shifted - SHIFT;
    let r = (u - k * LN2_HI) - k * LN2_LO;
    let k_int = shifted.to_bits().wrapping_sub(SHIFT.to_bits()) as i64;
    (r, k_int)
}

/// 2ᵏ for −1022 ≤ k ≤ 1023, from k's bits.
#[inline(always)]
fn pow2(k: i64) -> f64 {
    f64::from_bits((k.wrapping_add(1023) as u64) << 52)
}

/// R(r) − 2 from the first `N` terms of [`R_SERIES`].
#[inline(always)]
fn r_minus_2<const N: usize>(r: f64) -> f64 {
    let z = r * r;
    let mut p = R_SERIES[N - 1];
    let mut n = N - 1;
    while n > 0 {
        n -= 1;
        p = p * z + R_SERIES[n];
    }
    z * p
}

/// eˣ within 1 ulp of the C library's exp (tested below on 3 million arguments over the whole
/// range, subnormal results included): +∞ beyond 709.78, gradual underflow to 0 below −708.4,
/// NaN for NaN.
///
/// |r| ≤ ln 2 / 2, where the first six terms of R leave out less than 2⁻⁵⁷ of it; eʳ − 1 =
/// 2r/(R − r) is summed as r + r·c/(2 − c) with c = r − (R − 2), so that the rounding errors fall
/// on the small part r·c/(2 − c) ≈ r²/2 (the arrangement of fdlibm's exp): the result differs
/// from the C library's on about one argument in ten, against one in eight for 1 + 2r/(R − r),
/// and the loss's round-off stays as small as with the C library's (crates/fd's accuracy tests
/// hold the finite differences to their measured bounds only so).
#[inline]
pub fn exp(x: f64) -> f64 {
    // Below −746 the result rounds to 0, above 710 to +∞; the clamp keeps k in range.
    let (r, k) = reduce(x.clamp(-746.0, 710.0), 0.0);
    let c = r - r_minus_2::<6>(r);
    let p = 1.0 + (r + r * c / (2.0 - c));
    // 2ᵏ as 2^(k/2) · 2^(k − k/2), both normal: the first product is exact, the second rounds
    // once (to +∞, or into the subnormals).
    let half = k >> 1;
    let e = p * pow2(half) * pow2(k - half);
    if x.is_nan() { x } else { e }
}

/// The hyperbolic tangent of a double, within 3 ulp of the C library's tanh (2.73 the worst
/// measured, 0.22 on average); odd, ±1 beyond ±22, NaN for NaN. Monotone to within its error:
/// neighbouring doubles may come out an ulp out of order, which no finite difference resolves.
///
/// u = 2|x| is reduced with r / ln 2 ∈ [−¼, ¾] rather than [−½, ½]: where r < 0 the
/// numerator's two terms cancel in part, and with r ≥ −ln 2 / 4 they cancel less. R then needs
/// its seventh term (r up to 0.52), and the eighth is below 2⁻⁵⁶ of it. From k = 2 on (tanh above
/// 0.53) the quotient taken is 1 − tanh = 2(R − r)/((2ᵏ + 1)R + (2ᵏ − 1)r), whose rounding
/// errors shrink with it: near ±1, where a tanh layer's slope 1 − tanh² magnifies every error of
/// tanh, the result is then as good as the C library's (the num-dual gradient tests of tanh
/// networks hold to 1e-12 only so).
#[inline]
pub fn tanh(x: f64) -> f64 {
    let u = 2.0 * x.abs().min(22.0);
    let (r, k) = reduce(u, 0.25);
    let s = pow2(k);
    let big_r = 2.0 + r_minus_2::<7>(r);
    let near_one = k >= 2;
    let numerator = if near_one {
        2.0 * (big_r - r)
    } else {
        (s - 1.0) * big_r + (s + 1.0) * r
    };
    let q = numerator / ((s + 1.0) * big_r + (s - 1.0) * r);
    let t = if near_one { 1.0 - q } else { q };
    if x.is_nan() { x } else { t.copysign(x) }
}

/// 2/(2n + 1) for n = 1..=9: ln(1 + f) = 2·atanh(s) = 2s + s·Σₙ 2s²ⁿ/(2n + 1), s = f/(2 + f).
const ATANH_SERIES: [f64; 9] = [
    2.0 / 3.0,
    2.0 / 5.0,
    2.0 / 7.0,
    2.0 / 9.0,
    2.0 / 11.0,
    2.0 / 13.0,
    2.0 / 15.0,
    2.0 / 17.0,
    2.0 / 19.0,
];

/// The natural logarithm, within 1 ulp of the C library's log (tested below over the whole
/// range, subnormals included): −∞ at ±0, NaN below 0 and for NaN, +∞ at +∞; subnormals are
/// scaled by 2⁵⁴ first.
///
/// x = 2ᵉ·m with √½ ≤ m < √2 and f = m − 1; ln(1 + f) = 2·atanh(s) with s = f / (2 + f),
/// |s| ≤ 0.172, summed as f − f²/2 + s·(f²/2 + R) with R = 2s²/3 + … + 2s¹⁸/19 (the next term is
/// below 2⁻⁵⁵ of 2s), and e·ln 2 added in the two parts of its split. The f32 [`ln_f32`]
/// (super::f32::ln_f32) is the same with fewer terms.
#[inline]
pub fn ln(x: f64) -> f64 {
    /// The bits of √½ rounded to f64.
    const SQRT_HALF_BITS: i64 = 0x3fe6_a09e_667f_3bcd;
    let sub = x < f64::MIN_POSITIVE;
    let scaled = if sub { x * 18_014_398_509_481_984.0 } else { x }; // 2⁵⁴
    let ix = (scaled.to_bits() as i64).wrapping_sub(SQRT_HALF_BITS);
    let e = (ix >> 52) - if sub { 54 } else { 0 };
    let m = f64::from_bits(((ix & 0x000f_ffff_ffff_ffff) + SQRT_HALF_BITS) as u64);
    let f = m - 1.0;
    let s = f / (2.0 + f);
    let z = s * s;
    let mut p = ATANH_SERIES[8];
    let mut n = 8;
    while n > 0 {
        n -= 1;
        p = p * z + ATANH_SERIES[n];
    }
    let r = z * p;
    let hfsq = 0.5 * f * f;
    let k = e as f64;
    let y = k * LN2_HI - ((hfsq - (s * (hfsq + r) + k * LN2_LO)) - f);
    if x.is_nan() || x < 0.0 {
        f64::NAN
    } else if x == 0.0 {
        f64::NEG_INFINITY
    } else if x == f64::INFINITY {
        x
    } else {
        y
    }
}

/// The logistic function 1/(1 + e⁻ˣ), the same operations as the engine's `sigmoid` (which
/// divides e^−|x| by 1 + e^−|x| for x < 0), without its branch, so that the loop vectorises;
/// NaN for NaN.
#[inline]
pub fn sigmoid(x: f64) -> f64 {
    let e = exp(-x.abs());
    let numerator = if x >= 0.0 { 1.0 } else { e };
    if x.is_nan() { x } else { numerator / (1.0 + e) }
}

super::dispatched!(
    /// [`tanh`] of every value, in place: the loop of the engine's tanh layers.
    tanh_in_place,
    tanh_plain,
    tanh_avx2,
    tanh_avx512,
    f64,
    tanh
);

super::dispatched!(
    /// [`exp`] of every value, in place: the loop of the softmax and the cross-entropy.
    exp_in_place,
    exp_plain,
    exp_avx2,
    exp_avx512,
    f64,
    exp
);

super::dispatched!(
    /// [`ln`] of every value, in place: the log-sum-exp of the cross-entropy, one per row.
    ln_in_place,
    ln_plain,
    ln_avx2,
    ln_avx512,
    f64,
    ln
);

super::dispatched!(
    /// [`sigmoid`] of every value, in place: the loop of the engine's sigmoid layers.
    sigmoid_in_place,
    sigmoid_plain,
    sigmoid_avx2,
    sigmoid_avx512,
    f64,
    sigmoid
);

#[cfg(test)]
mod tests {
    use super::*;

    /// |a − b| in units of b's last place (relative: b·ε).
    fn ulps(a: f64, b: f64) -> f64 {
        ((a - b) / (b.abs() * f64::EPSILON).max(f64::MIN_POSITIVE)).abs()
    }

    /// How many doubles lie between a and b (±0 are one point), subnormals included.
    fn ulps_apart(a: f64, b: f64) -> u64 {
        let ordered = |x: f64| {
            let bits = x.to_bits();
            if bits >> 63 == 0 {
                bits as i128
            } else {
                -((bits & !(1 << 63)) as i128)
            }
        };
        ordered(a).abs_diff(ordered(b)) as u64
    }

    /// A xorshift stream of uniform numbers in [−½, ½).
    fn uniform(count: usize) -> impl Iterator<Item = f64> {
        let mut s: u64 = 0x9e37_79b9_7f4a_7c15;
        (0..count).map(move |_| {
            s ^= s << 13;
            s ^= s >> 7;
            s ^= s << 17;
            (s >> 11) as f64 / (1u64 << 53) as f64 - 0.5
        })
    }

    #[test]
    fn tanh_agrees_with_the_c_library_within_3_ulp() {
        // Around 0, where rounding is relative; the body, where the reduction's k steps; the
        // tails that round to ±1; tiny arguments; around |x| = 22, where the clamp is.
        let mut worst = (0.0f64, 0.0f64);
        for (i, u) in uniform(2_500_000).enumerate() {
            let x = match i % 5 {
                0 => u * 2.0,
                1 => u * 12.0,
                2 => u * 100.0,
                3 => u * 1e-6,
                _ => (22.0 + u).copysign(u),
            };
            let e = ulps(tanh(x), x.tanh());
            if e > worst.0 {
                worst = (e, x);
            }
        }
        assert!(worst.0 <= 3.0, "{} ulp at {:e}", worst.0, worst.1);
        // Near ±1, where 1 − tanh² magnifies every error, within 1 ulp.
        let mut worst = (0u64, 0.0f64);
        for u in uniform(1_000_000) {
            let x = (1.0 + (u + 0.5) * 21.0).copysign(u);
            let e = ulps_apart(tanh(x), x.tanh());
            if e > worst.0 {
                worst = (e, x);
            }
        }
        assert!(worst.0 <= 1, "{} ulp at {:e} (beyond ±1)", worst.0, worst.1);
        // Subnormals and the smallest normals: tanh x = x there, bit for bit, in both.
        for x in [5e-324, 1e-310, 2.2e-308, 1e-300, 1e-20] {
            for x in [x, -x] {
                assert_eq!(tanh(x).to_bits(), x.tanh().to_bits(), "at {x:e}");
                assert_eq!(tanh(x), x);
            }
        }
    }

    #[test]
    fn tanh_special_values_and_symmetry() {
        assert_eq!(tanh(0.0).to_bits(), 0.0f64.to_bits());
        assert_eq!(tanh(-0.0).to_bits(), (-0.0f64).to_bits());
        assert_eq!(tanh(f64::INFINITY), 1.0);
        assert_eq!(tanh(f64::NEG_INFINITY), -1.0);
        assert_eq!(tanh(22.0), 1.0);
        assert_eq!(tanh(-1e300), -1.0);
        assert_eq!(tanh(f64::MAX), 1.0);
        assert!(tanh(f64::NAN).is_nan());
        for i in 0..10_000 {
            let x = f64::from(i) * 1e-3;
            assert_eq!(tanh(-x), -tanh(x));
            // Monotone at the scale of any step a difference takes (not ulp by ulp).
            assert!(tanh(x + 1e-3) >= tanh(x), "not monotone at {x}");
        }
    }

    #[test]
    fn exp_agrees_with_the_c_library_within_1_ulp() {
        // Around 0; the whole range; the exponents a loss meets; into the overflow; into and
        // through the subnormal results (−708.4 to −745.1).
        let mut worst = (0u64, 0.0f64);
        for (i, u) in uniform(3_000_000).enumerate() {
            let x = match i % 6 {
                0 => u * 2.0,
                1 => u * 1500.0,
                2 => u * 60.0,
                3 => u * 1e-9,
                4 => 709.5 + u,
                _ => -727.0 + u * 40.0,
            };
            let (ours, c) = (exp(x), x.exp());
            if c.is_infinite() || c == 0.0 {
                assert_eq!(ours.to_bits(), c.to_bits(), "at {x:e}");
                continue;
            }
            let e = ulps_apart(ours, c);
            if e > worst.0 {
                worst = (e, x);
            }
        }
        assert!(worst.0 <= 1, "{} ulp at {:e}", worst.0, worst.1);
    }

    #[test]
    fn exp_special_values() {
        assert_eq!(exp(0.0), 1.0);
        assert_eq!(exp(-0.0), 1.0);
        assert_eq!(exp(f64::NEG_INFINITY), 0.0);
        assert_eq!(exp(f64::INFINITY), f64::INFINITY);
        assert_eq!(exp(710.0), f64::INFINITY);
        assert_eq!(exp(f64::MAX), f64::INFINITY);
        assert_eq!(exp(-746.0), 0.0);
        assert_eq!(exp(f64::MIN), 0.0);
        assert!(exp(f64::NAN).is_nan());
        // The smallest subnormal: e^−744.44 (−744.4400719213812 = ln 2⁻¹⁰⁷⁴ to double precision).
        assert_eq!(exp(-744.440_071_921_381_2), 5e-324);
        // e¹ and e⁻¹ within an ulp: e = 2.718281828459045235… (std's E, the double nearest to
        // it), 1/e = 0.367879441171442321… (digits from memory).
        assert!(ulps_apart(exp(1.0), std::f64::consts::E) <= 1);
        assert!((exp(-1.0) - 0.367_879_441_171_442_3).abs() <= f64::EPSILON * 0.37);
    }

    #[test]
    fn ln_agrees_with_the_c_library_within_1_ulp() {
        // Around 1, where ln is near 0; where the mantissa wraps at √½ and √2; every exponent;
        // subnormals; near the largest double.
        let mut worst = (0u64, 0.0f64);
        for (i, u) in uniform(3_000_000).enumerate() {
            let x = match i % 6 {
                0 => 1.0 + u * 0.02,
                1 => 1.0 + u * 1e-9,
                2 => std::f64::consts::FRAC_1_SQRT_2 + u * 1e-3,
                3 => (u * 1400.0).exp2() * 1.3,
                4 => f64::from_bits(((u + 0.5) * 4.5e15) as u64 + 1),
                _ => f64::MAX * (0.75 + u * 0.5),
            };
            let e = ulps_apart(ln(x), x.ln());
            if e > worst.0 {
                worst = (e, x);
            }
        }
        assert!(worst.0 <= 1, "{} ulp at {:e}", worst.0, worst.1);
    }

    #[test]
    fn ln_special_values() {
        assert_eq!(ln(1.0).to_bits(), 0.0f64.to_bits());
        assert_eq!(ln(0.0), f64::NEG_INFINITY);
        assert_eq!(ln(-0.0), f64::NEG_INFINITY);
        assert_eq!(ln(f64::INFINITY), f64::INFINITY);
        assert!(ln(-1.0).is_nan() && ln(f64::NEG_INFINITY).is_nan());
        assert!(ln(-5e-324).is_nan() && ln(f64::NAN).is_nan());
        assert_eq!(ln(2.0), std::f64::consts::LN_2);
        assert_eq!(ln(std::f64::consts::E), 1.0);
        // ln 2⁻¹⁰⁷⁴ = −744.4400719213812… and ln(2¹⁰²⁴(1 − 2⁻⁵³)) = 709.782712893384 (the
        // largest double).
        assert_eq!(ln(5e-324), -744.440_071_921_381_2);
        assert_eq!(ln(f64::MAX), 709.782_712_893_384);
    }

    #[test]
    fn sigmoid_agrees_with_the_logistic_function() {
        // 1/(1 + e⁻ˣ) with the C library's exp, on the side that cannot overflow: within 2 ulp
        // (ours adds exp's 1 ulp to the same two roundings).
        let mut worst = (0.0f64, 0.0f64);
        for (i, u) in uniform(1_000_000).enumerate() {
            let x = if i % 2 == 0 { u * 80.0 } else { u * 4.0 };
            let reference = if x >= 0.0 {
                1.0 / (1.0 + (-x).exp())
            } else {
                x.exp() / (1.0 + x.exp())
            };
            let e = ulps(sigmoid(x), reference);
            if e > worst.0 {
                worst = (e, x);
            }
        }
        assert!(worst.0 <= 2.0, "{} ulp at {:e}", worst.0, worst.1);
        assert_eq!(sigmoid(0.0), 0.5);
        assert_eq!(sigmoid(-0.0), 0.5);
        assert_eq!(sigmoid(800.0), 1.0);
        assert_eq!(sigmoid(-800.0), 0.0);
        assert_eq!(sigmoid(f64::INFINITY), 1.0);
        assert_eq!(sigmoid(f64::NEG_INFINITY), 0.0);
        assert!(sigmoid(f64::NAN).is_nan());
    }

    #[test]
    fn the_slice_versions_match_bit_for_bit() {
        let mut values: Vec<f64> = (0..4099)
            .map(|i| (f64::from(i) * 0.37).sin() * 9.0)
            .collect();
        values
            .extend((0..40_000u64).map(|i| f64::from_bits(i.wrapping_mul(0x9e37_79b9_7f4a_7c15))));
        values.extend([
            0.0,
            -0.0,
            f64::NAN,
            f64::INFINITY,
            f64::NEG_INFINITY,
            -30.0,
            1e-310,
            709.8,
            -745.0,
            22.0,
        ]);
        let bits = f64::to_bits;
        let loops = super::super::builds!(tanh_plain, tanh_in_place, tanh_avx2, tanh_avx512, f64);
        super::super::same_bits_every_way(&values, bits, tanh, &loops);
        let loops = super::super::builds!(exp_plain, exp_in_place, exp_avx2, exp_avx512, f64);
        super::super::same_bits_every_way(&values, bits, exp, &loops);
        let loops = super::super::builds!(ln_plain, ln_in_place, ln_avx2, ln_avx512, f64);
        super::super::same_bits_every_way(&values, bits, ln, &loops);
        let loops = super::super::builds!(
            sigmoid_plain,
            sigmoid_in_place,
            sigmoid_avx2,
            sigmoid_avx512,
            f64
        );
        super::super::same_bits_every_way(&values, bits, sigmoid, &loops);
    }

    #[test]
    fn the_ln2_split_is_ln2() {
        // k·LN2_HI is exact for |k| < 2²¹.
        assert_eq!(LN2_HI.to_bits() & 0x1f_ffff, 0);
        assert_eq!(
            (LN2_HI.to_bits(), LN2_LO.to_bits()),
            (0x3fe6_2e42_fee0_0000, 0x3dea_39ef_3579_3c76)
        );
        // ln 2 = 0.693147180559945309417232121458…, whose f64 rounding (LN_2) falls short of it by
        // 2.3190468138462996e-17 (digits from memory; the two agree with each other, and exp
        // agrees with the C library's to an ulp, which a wrong split would break).
        let tail = (LN2_HI - std::f64::consts::LN_2) + LN2_LO;
        assert!(
            (tail - 2.319_046_813_846_299_6e-17).abs() < 2e-26,
            "{tail:e}"
        );
    }

    #[test]
    fn the_series_of_r_coth_half_r() {
        // The Bernoulli numbers from their recurrence Σⱼ₌₀..ₘ C(m + 1, j)·Bⱼ = 0 (B₀ = 1), in
        // exact fractions, then cₙ = 2·B₂ₙ/(2n)!: the constants must be these, rounded.
        fn gcd(a: i128, b: i128) -> i128 {
            if b == 0 { a.abs() } else { gcd(b, a % b) }
        }
        let reduced = |(p, q): (i128, i128)| {
            let g = gcd(p, q).max(1) * q.signum();
            (p / g, q / g)
        };
        let mut b: Vec<(i128, i128)> = vec![(1, 1)];
        for m in 1..=16i128 {
            let (mut sp, mut sq) = (0i128, 1i128);
            let mut binomial = 1i128; // C(m + 1, j)
            for (j, &(p, q)) in (0i128..).zip(&b) {
                (sp, sq) = reduced((sp * q + binomial * p * sq, sq * q));
                binomial = binomial * (m + 1 - j) / (j + 1);
            }
            b.push(reduced((-sp, sq * (m + 1)))); // C(m + 1, m) = m + 1
        }
        assert_eq!((b[12], b[14], b[16]), ((-691, 2730), (7, 6), (-3617, 510)));
        let mut factorial = 1i128;
        let mut c_of = |n: usize| {
            factorial *= ((2 * n - 1) * 2 * n) as i128;
            let (p, q) = b[2 * n];
            2.0 * p as f64 / (q * factorial) as f64
        };
        for (i, &c) in R_SERIES.iter().enumerate() {
            let expected = c_of(i + 1);
            assert!(
                ulps(c, expected) <= 1.0,
                "c{}: {c:e} against {expected:e}",
                i + 1
            );
        }
        let c8 = c_of(8);
        // A second way: R(r) = r / tanh(r/2), with the C library's tanh, over the ranges the two
        // functions use (|r| ≤ ln 2 / 2 for exp, r up to 3 ln 2 / 4 for tanh).
        for i in 1..=100 {
            let r = f64::from(i) * 0.0052 - 0.0002;
            for r in [r, -r] {
                let coth = r / (r / 2.0).tanh();
                assert!(ulps(2.0 + r_minus_2::<7>(r), coth) <= 2.0, "at {r}");
                if r.abs() <= 0.35 {
                    assert!(ulps(2.0 + r_minus_2::<6>(r), coth) <= 2.0, "at {r}");
                }
            }
        }
        // The first term left out, against R ≥ 2: c₈·r¹⁶ at 3 ln 2 / 4 for tanh, c₇·r¹⁴ at
        // ln 2 / 2 for exp.
        let c7 = R_SERIES[6];
        let ln2 = std::f64::consts::LN_2;
        assert!((c8 * (0.75 * ln2).powi(16) / 2.0).abs() < 2f64.powi(-56));
        assert!((c7 * (0.5 * ln2).powi(14) / 2.0).abs() < 2f64.powi(-57));
    }
}
