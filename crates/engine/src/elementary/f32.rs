//! eˣ, ln, tanh and the logistic function in f32, computed in f32 throughout (no widening to
//! f64), so that a check in f32 costs less than one in f64.
//!
//! exp and tanh reduce the argument by multiples of ln 2 (x = k·ln 2 + r, eˣ = 2ᵏ·eʳ) and sum
//! the Taylor series of eʳ − 1; tanh(x) = e / (e + 2) with e = e²ˡˣˡ − 1, except near 0, where it
//! sums its own series instead (the quotient would lose 2 ulp); ln uses the 2·atanh series. Each
//! is within 1 ulp of f64's function rounded to f32 (tanh within 3 of the C library's tanhf,
//! which is itself up to 2 off); the tests below say on which arguments that was measured.

/// ln 2 split for f32 (the split of the freely distributable fdlibm library's expf): LN2_HI_F32
/// has nine trailing zero bits, so k·LN2_HI_F32 is exact for |k| < 2⁹ (|k| ≤ 150 here), and
/// LN2_LO_F32 is ln 2 − LN2_HI_F32 rounded to the nearest f32. That difference lies in
/// [2⁻²⁰, 2⁻¹⁹), where an f32's ulp is 2⁻⁴³, so the two parts sum to ln 2 within half of it,
/// 2⁻⁴⁴ ≈ 5.7e-14 (−5.498e-14 exactly; see the test). In a reduction x − k·ln 2 that is at most
/// 150 · 5.7e-14 ≈ 9e-12 on r, under 2⁻³⁶ of eʳ: far below an f32 rounding.
const LN2_HI_F32: f32 = f32::from_bits(0x3f31_7200); // 0.693145751953125
const LN2_LO_F32: f32 = f32::from_bits(0x35bf_be8e); // 1.4286068e-6

/// 1.5 · 2²³: adding it to a number of magnitude below 2²² rounds that number to an integer, held
/// in the low bits of the sum.
const SHIFT_F32: f32 = 12_582_912.0;

/// 1/n! for n = 2..=8 in f32.
const INV_FACTORIAL_F32: [f32; 7] = [
    1.0 / 2.0,
    1.0 / 6.0,
    1.0 / 24.0,
    1.0 / 120.0,
    1.0 / 720.0,
    1.0 / 5040.0,
    1.0 / 40320.0,
];

/// x = k·ln 2 + r with |r| ≤ ln 2 / 2 (to rounding), for |x| < 2²¹.
#[inline(always)]
fn reduce_f32(x: f32) -> (f32, i32) {
    let shifted = x * std::f32::consts::LOG2_E + SHIFT_F32;
    let k = shifted - SHIFT_F32;
    let r = (x - k * LN2_HI_F32) - k * LN2_LO_F32;
    let k_bits = shifted.to_bits().wrapping_sub(SHIFT_F32.to_bits()) as i32;
    (r, k_bits)
}

/// eʳ − 1 for |r| ≤ ln 2 / 2: r + r²·(1/2! + r/3! + … + r⁶/8!); the next term is below 2⁻³⁰ of
/// the sum.
#[inline(always)]
fn exp_m1_reduced_f32(r: f32) -> f32 {
    let mut p = INV_FACTORIAL_F32[6];
    let mut n = 5;
    loop {
        p = p * r + INV_FACTORIAL_F32[n];
        if n == 0 {
            break;
        }
        n -= 1;
    }
    r + r * r * p
}

/// 2ᵏ for −126 ≤ k ≤ 127, from k's bits.
#[inline(always)]
fn pow2_f32(k: i32) -> f32 {
    f32::from_bits(((k + 127) as u32) << 23)
}

/// eˣ in f32, within 1 ulp of f64's exp rounded to f32 on every f32 (`f32_exhaustive`) and of the
/// C library's expf (tested below on every 509th f32 and around the edges): +∞ beyond
/// 88.73, gradual underflow to 0 below −87.34, NaN for NaN.
#[inline]
pub fn exp_f32(x: f32) -> f32 {
    // Below −104 the result rounds to 0, above 89 to +∞; the clamp keeps k in range.
    let (r, k) = reduce_f32(x.clamp(-104.0, 89.0));
    let p = 1.0 + exp_m1_reduced_f32(r);
    // 2ᵏ as 2^(k/2) · 2^(k − k/2), both normal: the first product is exact, the second rounds once
    // (to +∞, or into the subnormals).
    let half = k >> 1;
    let e = p * pow2_f32(half) * pow2_f32(k - half);
    if x.is_nan() { x } else { e }
}

/// The natural logarithm in f32, within 1 ulp of f64's ln rounded to f32 and of the C library's
/// logf (tested below on every 509th f32 and around the edges): −∞ at ±0, NaN below 0 and for
/// NaN, +∞ at +∞; subnormals are scaled by 2²⁵ first.
///
/// x = 2ᵉ·m with √½ ≤ m < √2 and f = m − 1; ln(1 + f) = 2·atanh(s) with s = f / (2 + f),
/// |s| ≤ 0.172, summed as f − f²/2 + s·(f²/2 + R) with R = 2s²/3 + 2s⁴/5 + … + 2s¹⁰/11 (the next
/// term is below 2⁻³⁰ of the sum), and e·ln 2 added in the two parts of its split.
#[inline]
pub fn ln_f32(x: f32) -> f32 {
    /// The bits of √½ rounded to f32.
    const SQRT_HALF_BITS: i32 = 0x3f35_04f3;
    let sub = x < f32::MIN_POSITIVE;
    let scaled = if sub { x * 33_554_432.0 } else { x }; // 2²⁵
    let ix = (scaled.to_bits() as i32).wrapping_sub(SQRT_HALF_BITS);
    let e = (ix >> 23) - if sub { 25 } else { 0 };
    let m = f32::from_bits(((ix & 0x007f_ffff) + SQRT_HALF_BITS) as u32);
    let f = m - 1.0;
    let s = f / (2.0 + f);
    let z = s * s;
    let r =
        z * (2.0 / 3.0 + z * (2.0 / 5.0 + z * (2.0 / 7.0 + z * (2.0 / 9.0 + z * (2.0 / 11.0)))));
    let hfsq = 0.5 * f * f;
    let k = e as f32;
    let y = k * LN2_HI_F32 - ((hfsq - (s * (hfsq + r) + k * LN2_LO_F32)) - f);
    if x.is_nan() || x < 0.0 {
        f32::NAN
    } else if x == 0.0 {
        f32::NEG_INFINITY
    } else if x == f32::INFINITY {
        x
    } else {
        y
    }
}

/// The first terms of the tanh series x + Σₙ aₙ·x²ⁿ⁺¹, aₙ = 2²ⁿ⁺²(2²ⁿ⁺² − 1)·B₂ₙ₊₂/(2n + 2)!
/// for n = 1..=6 (B the Bernoulli numbers; the values are checked in the tests against the
/// series' own recurrence).
const TANH_SERIES_F32: [f32; 6] = [
    -1.0 / 3.0,
    2.0 / 15.0,
    -17.0 / 315.0,
    62.0 / 2835.0,
    -1382.0 / 155_925.0,
    21_844.0 / 6_081_075.0,
];

/// Below this |x|, [`tanh_f32`] sums its series; from it on, it divides e by e + 2.
const TANH_SERIES_BELOW_F32: f32 = 0.375;

/// The hyperbolic tangent in f32: within 1 ulp of f64's tanh rounded to f32 (every f32 of
/// [0, 9.5) measured, range by range, while the two parts were chosen; the tests below sweep
/// every 509th f32 and every f32 around the switch) and within 3 ulp of the C library's tanhf,
/// which is itself up to 2 ulp from that reference; odd, ±1 beyond ±9.1 (where 1 − tanh falls below half an ulp of 1), NaN for
/// NaN.
///
/// For |x| ≥ 0.375, tanh(x) = e / (e + 2) with e = e²ˡˣˡ − 1 = 2ᵏ(eʳ − 1) + (2ᵏ − 1), as the f64
/// [`tanh`]. Nearer 0 an error in e passes into the quotient undiminished and the rounding of
/// e + 2 adds to it (2 ulp in all, measured), so there tanh is the series up to x¹³, whose next
/// term is below 2⁻²⁹ of the sum. Both are computed and one chosen, so the loop has no branch.
#[inline]
pub fn tanh_f32(x: f32) -> f32 {
    let a = x.abs();
    let z = a * a;
    let mut p = TANH_SERIES_F32[5];
    for &c in TANH_SERIES_F32[..5].iter().rev() {
        p = p * z + c;
    }
    let series = a + a * z * p;
    let (r, k) = reduce_f32(2.0 * a.min(10.0));
    let scale = pow2_f32(k);
    let e = exp_m1_reduced_f32(r) * scale + (scale - 1.0);
    let quotient = e / (e + 2.0);
    let t = if a < TANH_SERIES_BELOW_F32 {
        series
    } else {
        quotient
    };
    if x.is_nan() { x } else { t.copysign(x) }
}

/// The logistic function 1/(1 + e⁻ˣ) in f32, the same operations as the engine's `sigmoid`
/// (see the f64 [`sigmoid`](super::f64::sigmoid)), without its branch.
#[inline]
pub fn sigmoid_f32(x: f32) -> f32 {
    let e = exp_f32(-x.abs());
    let numerator = if x >= 0.0 { 1.0 } else { e };
    if x.is_nan() { x } else { numerator / (1.0 + e) }
}

super::dispatched!(
    /// [`exp_f32`] of every value, in place: the loop of the f32 softmax and cross-entropy.
    exp_in_place_f32,
    exp_plain_f32,
    exp_avx2_f32,
    exp_avx512_f32,
    f32,
    exp_f32
);

super::dispatched!(
    /// [`tanh_f32`] of every value, in place: the loop of the engine's f32 tanh layers.
    tanh_in_place_f32,
    tanh_plain_f32,
    tanh_avx2_f32,
    tanh_avx512_f32,
    f32,
    tanh_f32
);

super::dispatched!(
    /// [`ln_f32`] of every value, in place: the f32 log-sum-exp of the cross-entropy.
    ln_in_place_f32,
    ln_plain_f32,
    ln_avx2_f32,
    ln_avx512_f32,
    f32,
    ln_f32
);

super::dispatched!(
    /// [`sigmoid_f32`] of every value, in place: the loop of the engine's f32 sigmoid layers.
    sigmoid_in_place_f32,
    sigmoid_plain_f32,
    sigmoid_avx2_f32,
    sigmoid_avx512_f32,
    f32,
    sigmoid_f32
);

#[cfg(test)]
mod tests {
    use super::*;

    /// The distance between two f32 in units in the last place: how many f32 lie between them,
    /// across zero too (±0 are one point).
    fn ulps_f32(a: f32, b: f32) -> u64 {
        let ordered = |x: f32| {
            let bits = x.to_bits();
            if bits >> 31 == 0 {
                i64::from(bits)
            } else {
                -i64::from(bits & 0x7fff_ffff)
            }
        };
        ordered(a).abs_diff(ordered(b))
    }

    /// Every f32 from `lo` to `hi` (both included, same sign).
    fn every_f32(lo: f32, hi: f32) -> impl Iterator<Item = f32> {
        assert_eq!(
            lo.is_sign_negative(),
            hi.is_sign_negative(),
            "{lo:e}..{hi:e}"
        );
        let (a, b) = (lo.to_bits(), hi.to_bits());
        (a.min(b)..=a.max(b)).map(f32::from_bits)
    }

    /// The f32 arguments of the accuracy tests: every 509th f32 (8.4 million of them: both signs,
    /// subnormals, normals, ±∞ and NaNs), the edges, and every f32 of the `dense` ranges.
    fn arguments_f32(dense: &[(f32, f32)]) -> impl Iterator<Item = f32> + '_ {
        let sweep = (0..=u32::MAX / 509).map(|i| f32::from_bits(i * 509));
        let dense = dense.iter().flat_map(|&(lo, hi)| every_f32(lo, hi));
        sweep.chain(EDGES_F32).chain(dense)
    }

    /// The largest distance in ulp of `ours` from `reference` over `arguments`, and where; NaN
    /// must give NaN, and an infinity or zero the same infinity or signed zero.
    fn worst_f32(
        ours: fn(f32) -> f32,
        reference: impl Fn(f32) -> f32,
        arguments: impl Iterator<Item = f32>,
    ) -> (u64, f32) {
        let mut worst = (0u64, 0.0f32);
        for x in arguments {
            let (a, b) = (ours(x), reference(x));
            if b.is_nan() || a.is_nan() {
                assert!(a.is_nan() && b.is_nan(), "at {x:e}: {a:e} against {b:e}");
                continue;
            }
            if b.is_infinite() || b == 0.0 {
                assert_eq!(a.to_bits(), b.to_bits(), "at {x:e}: {a:e} against {b:e}");
                continue;
            }
            let d = ulps_f32(a, b);
            if d > worst.0 {
                worst = (d, x);
            }
        }
        worst
    }

    /// The f64 function rounded to f32: within an f32 rounding of the exact value (the C
    /// library's f64 functions are within a few f64 ulp, 2⁻²⁹ of an f32 ulp), so the stricter of
    /// the two references.
    fn via_f64(f: fn(f64) -> f64) -> impl Fn(f32) -> f32 {
        move |x| f(f64::from(x)) as f32
    }

    /// Edges: zeros, the smallest subnormal and normal, the largest f32, ±∞, NaN, and where each
    /// function turns over (overflow, underflow, tanh's 1).
    const EDGES_F32: [f32; 20] = [
        0.0,
        -0.0,
        1e-45,
        -1e-45,
        f32::MIN_POSITIVE,
        f32::MAX,
        f32::MIN,
        f32::INFINITY,
        f32::NEG_INFINITY,
        f32::NAN,
        88.72283,
        88.72284,
        -87.33654,
        -103.27893,
        -103.97208,
        -104.0,
        9.010913,
        9.1,
        -10.0,
        1.0,
    ];

    // Against the C library (std's f32 exp, ln and tanh call libm's expf, logf, tanhf, glibc's on
    // the machines the suite runs on) and against the f64 functions rounded to f32.

    /// Where the result overflows, turns subnormal and underflows to 0, the clamps at 89 and
    /// −104, where the reduction's k steps from 0 to ±1 (x = ±ln 2 / 2), and where eˣ leaves 1
    /// (x = 2⁻²⁴ and −2⁻²⁵).
    const EXP_DENSE: [(f32, f32); 7] = [
        (88.0, 89.5),
        (-88.0, -87.0),
        (-104.5, -103.0),
        (0.34, 0.35),
        (-0.35, -0.34),
        (5.8e-8, 6.1e-8),
        (-3.1e-8, -2.9e-8),
    ];

    #[test]
    fn f32_exp_agrees_with_the_c_library_within_1_ulp() {
        let (worst, at) = worst_f32(exp_f32, f32::exp, arguments_f32(&EXP_DENSE));
        assert!(worst <= 1, "{worst} ulp at {at:e}");
        let (worst, at) = worst_f32(exp_f32, via_f64(f64::exp), arguments_f32(&EXP_DENSE));
        assert!(worst <= 1, "{worst} ulp from the f64 exp at {at:e}");
    }

    /// Around 1 (where ln is near 0), where the mantissa wraps at √½ and √2, the largest
    /// subnormals and smallest normals (the 2²⁵ scaling), the smallest subnormals, and f32::MAX.
    fn ln_dense() -> [(f32, f32); 6] {
        let normal = f32::MIN_POSITIVE.to_bits();
        [
            (0.99, 1.01),
            (0.70, 0.71),
            (1.41, 1.42),
            (
                f32::from_bits(normal - 200_000),
                f32::from_bits(normal + 200_000),
            ),
            (f32::from_bits(1), f32::from_bits(200_000)),
            (3.3e38, f32::MAX),
        ]
    }

    #[test]
    fn f32_ln_agrees_with_the_c_library_within_1_ulp() {
        let dense = ln_dense();
        let (worst, at) = worst_f32(ln_f32, f32::ln, arguments_f32(&dense));
        assert!(worst <= 1, "{worst} ulp at {at:e}");
        let (worst, at) = worst_f32(ln_f32, via_f64(f64::ln), arguments_f32(&dense));
        assert!(worst <= 1, "{worst} ulp from the f64 ln at {at:e}");
    }

    /// Around the switch from the series to the quotient (±0.375), where the quotient's k steps
    /// from 0 to 1 (x = 3 ln 2 / 4 ≈ 0.52), where tanh reaches 1 (9.01) and the clamp at 10.
    const TANH_DENSE: [(f32, f32); 5] = [
        (0.3, 0.45),
        (-0.45, -0.3),
        (0.5, 0.54),
        (8.9, 9.2),
        (9.9, 10.1),
    ];

    // The C library's tanhf is itself up to 2 ulp from the f64 reference (asserted below), so
    // ours, within 1 of that reference, can be 3 from it.
    #[test]
    fn f32_tanh_is_within_1_ulp_of_f64_and_3_of_the_c_library() {
        let (worst, at) = worst_f32(tanh_f32, via_f64(f64::tanh), arguments_f32(&TANH_DENSE));
        assert!(worst <= 1, "{worst} ulp from the f64 tanh at {at:e}");
        let (worst, at) = worst_f32(tanh_f32, f32::tanh, arguments_f32(&TANH_DENSE));
        assert!(worst <= 3, "{worst} ulp at {at:e}");
        // The C library's tanhf is the looser reference, not a wrong one: it too is within 2 ulp
        // of the f64 reference here.
        let (worst, at) = worst_f32(f32::tanh, via_f64(f64::tanh), arguments_f32(&TANH_DENSE));
        assert!(worst <= 2, "C library: {worst} ulp at {at:e}");
    }

    /// Every f32, the bounds of the doc comments: `cargo test -p plumb-engine --lib f32_exhaustive
    /// -- --ignored --nocapture` (an hour or more on a busy 2-core machine; its figures are in
    /// benches/README.md).
    #[test]
    #[ignore = "every f32 through three functions and three references: an hour or more"]
    fn f32_exhaustive() {
        type Case = (
            &'static str,
            fn(f32) -> f32,
            fn(f32) -> f32,
            fn(f64) -> f64,
            u64,
            u64,
        );
        let cases: [Case; 3] = [
            ("exp", exp_f32, f32::exp, f64::exp, 1, 1),
            ("ln", ln_f32, f32::ln, f64::ln, 1, 1),
            ("tanh", tanh_f32, f32::tanh, f64::tanh, 1, 3),
        ];
        for (name, ours, c_library, exact, to_f64, to_c) in cases {
            let all = || (0..=u32::MAX).map(f32::from_bits);
            let (worst, at) = worst_f32(ours, via_f64(exact), all());
            println!("{name}: {worst} ulp from the f64 {name} rounded to f32 (at {at:e})");
            assert!(worst <= to_f64);
            let (worst, at) = worst_f32(ours, c_library, all());
            println!("{name}: {worst} ulp from the C library (at {at:e})");
            assert!(worst <= to_c);
            let (worst, at) = worst_f32(c_library, via_f64(exact), all());
            println!("{name}: the C library is {worst} ulp from the f64 {name} (at {at:e})");
        }
    }

    #[test]
    fn f32_slice_versions_match_bit_for_bit() {
        let mut values: Vec<f32> = (0..40_000u32)
            .map(|i| f32::from_bits(i.wrapping_mul(2_654_435_761)))
            .collect();
        values.extend((0..4099).map(|i| (i as f32 * 0.37).sin() * 90.0));
        values.extend(EDGES_F32);
        let bits = f32::to_bits;
        use super::super::{builds, same_bits_every_way};
        let loops = builds!(
            exp_plain_f32,
            exp_in_place_f32,
            exp_avx2_f32,
            exp_avx512_f32,
            f32
        );
        same_bits_every_way(&values, bits, exp_f32, &loops);
        let loops = builds!(
            tanh_plain_f32,
            tanh_in_place_f32,
            tanh_avx2_f32,
            tanh_avx512_f32,
            f32
        );
        same_bits_every_way(&values, bits, tanh_f32, &loops);
        let loops = builds!(
            ln_plain_f32,
            ln_in_place_f32,
            ln_avx2_f32,
            ln_avx512_f32,
            f32
        );
        same_bits_every_way(&values, bits, ln_f32, &loops);
        let loops = builds!(
            sigmoid_plain_f32,
            sigmoid_in_place_f32,
            sigmoid_avx2_f32,
            sigmoid_avx512_f32,
            f32
        );
        same_bits_every_way(&values, bits, sigmoid_f32, &loops);
    }

    #[test]
    fn f32_sigmoid_agrees_with_the_logistic_function_in_f64() {
        // Against 1/(1 + e⁻ˣ) in f64 rounded to f32: exp_f32's 1 ulp and two roundings.
        let reference = |x: f32| {
            let x = f64::from(x);
            (1.0 / (1.0 + (-x).exp())) as f32
        };
        let (worst, at) = worst_f32(
            sigmoid_f32,
            reference,
            (0..=u32::MAX / 509).map(|i| f32::from_bits(i * 509)),
        );
        assert!(worst <= 2, "{worst} ulp at {at:e}");
        assert_eq!(sigmoid_f32(0.0), 0.5);
        assert_eq!(sigmoid_f32(100.0), 1.0);
        assert_eq!(sigmoid_f32(-120.0), 0.0);
        assert!(sigmoid_f32(f32::NAN).is_nan());
    }

    #[test]
    fn f32_special_values() {
        assert_eq!(exp_f32(0.0), 1.0);
        assert_eq!(exp_f32(-0.0), 1.0);
        assert_eq!(exp_f32(f32::NEG_INFINITY), 0.0);
        assert_eq!(exp_f32(f32::INFINITY), f32::INFINITY);
        assert_eq!(exp_f32(f32::MAX), f32::INFINITY);
        assert_eq!(exp_f32(f32::MIN), 0.0);
        assert!(exp_f32(f32::NAN).is_nan());
        assert_eq!(ln_f32(1.0), 0.0);
        assert_eq!(ln_f32(0.0), f32::NEG_INFINITY);
        assert_eq!(ln_f32(-0.0), f32::NEG_INFINITY);
        assert_eq!(ln_f32(f32::INFINITY), f32::INFINITY);
        assert!(ln_f32(-1.0).is_nan() && ln_f32(f32::NEG_INFINITY).is_nan());
        assert!(ln_f32(-1e-45).is_nan() && ln_f32(f32::NAN).is_nan());
        assert_eq!(tanh_f32(0.0).to_bits(), 0.0f32.to_bits());
        assert_eq!(tanh_f32(-0.0).to_bits(), (-0.0f32).to_bits());
        assert_eq!(tanh_f32(1e-45), 1e-45);
        assert_eq!(tanh_f32(f32::INFINITY), 1.0);
        assert_eq!(tanh_f32(f32::NEG_INFINITY), -1.0);
        assert_eq!(tanh_f32(f32::MIN), -1.0);
        assert!(tanh_f32(f32::NAN).is_nan());
        for i in 0..10_000u16 {
            let x = f32::from(i) * 1e-3;
            assert_eq!(tanh_f32(-x), -tanh_f32(x));
        }
    }

    #[test]
    fn the_f32_ln2_split() {
        assert_eq!(
            (LN2_HI_F32.to_bits(), LN2_LO_F32.to_bits()),
            (0x3f31_7200, 0x35bf_be8e)
        );
        // k·LN2_HI_F32 is exact for |k| < 2⁹: nine trailing zero bits.
        assert_eq!(LN2_HI_F32.to_bits() & 0x1ff, 0);
        // The error of the split, in f64: LN2_HI_F32 − LN_2 is exact (the two are within a factor
        // of 2), adding LN2_LO_F32 rounds at 2⁻⁹⁷, and LN_2 falls short of ln 2 by
        // 2.3190468138462996e-17 (see the f64 module's the_ln2_split_is_ln2). mpmath at 40 digits gives the error
        // as −5.497923018708371e-14; the bound is half an ulp of LN2_LO_F32, 2⁻⁴⁴, which holds
        // only if LN2_LO_F32 is ln 2 − LN2_HI_F32 rounded to the nearest f32.
        let error = (f64::from(LN2_HI_F32) - std::f64::consts::LN_2) + f64::from(LN2_LO_F32)
            - 2.319_046_813_846_299_6e-17;
        assert!(
            (error + 5.497_923_018_708_371e-14).abs() < 1e-26,
            "{error:e}"
        );
        assert!(error.abs() <= 2f64.powi(-44), "{error:e}");
        assert!(
            LN2_LO_F32.to_bits() & 0x7f80_0000 == ((127 - 20) << 23),
            "LO in [2⁻²⁰, 2⁻¹⁹)"
        );
    }

    #[test]
    fn the_tanh_series_coefficients() {
        // tanh′ = 1 − tanh²: with tanh x = Σ aₙ x²ⁿ⁺¹ and a₀ = 1, (2n + 1)·aₙ = −Σᵢ₊ⱼ₌ₙ₋₁ aᵢaⱼ
        // for n ≥ 1; the constants must be these, rounded to f32.
        let mut a = vec![1.0f64];
        for n in 1..=TANH_SERIES_F32.len() {
            let sum: f64 = (0..n).map(|i| a[i] * a[n - 1 - i]).sum();
            a.push(-sum / (2 * n + 1) as f64);
        }
        for (n, &c) in TANH_SERIES_F32.iter().enumerate() {
            assert_eq!(c, a[n + 1] as f32, "a{}", n + 1);
        }
        // The first term left out, a₇·x¹⁵ at the switch, against tanh there.
        let x = f64::from(TANH_SERIES_BELOW_F32);
        let a7 = {
            let n = 7;
            let sum: f64 = (0..n).map(|i| a[i] * a[n - 1 - i]).sum();
            -sum / (2 * n + 1) as f64
        };
        assert!((a7 * x.powi(15) / x.tanh()).abs() < 2f64.powi(-29));
    }
}
