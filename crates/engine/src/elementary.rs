//! tanh for f64, written out so that it is cheap enough to run a few thousand times per perturbed
//! loss.
//!
//! A finite-difference check of a tanh network spends most of its time in tanh: moving one weight
//! of layer j changes every pre-activation of layer j + 1, and each must go through tanh again.
//! The C library's tanh takes 17–35 ns on the machine the benchmarks run on; this one takes about
//! 6 ns, 3 ns in the AVX2 loop of [`tanh_in_place`], and stays within 3 ulp of the C library's
//! (tested below over four ranges).
//!
//! tanh(x) = e / (e + 2) with e = eᵘ − 1, u = 2|x|, and the sign of x. eᵘ − 1 is computed without
//! cancellation: u = k·ln 2 + r with |r| ≤ ln 2 / 2, eʳ − 1 from its Taylor series (the first 14
//! terms; the 15th is below 2⁻⁶⁰ of the sum), and eᵘ − 1 = 2ᵏ(eʳ − 1) + (2ᵏ − 1). Beyond |x| = 22,
//! tanh is 1 to double precision.

/// ln 2 split so that k·LN2_HI is exact for the |k| ≤ 64 used here (LN2_HI has 21 trailing zero
/// bits), and LN2_HI + LN2_LO = ln 2 to about 1e-27. The split is the one of the freely
/// distributable fdlibm library; its values are checked in the tests below.
const LN2_HI: f64 = 0.693_147_180_369_123_8; // 0x3fe62e42fee00000
const LN2_LO: f64 = 1.908_214_929_270_587_7e-10; // 0x3dea39ef35793c76

/// 1.5 · 2⁵²: adding it to a number of magnitude below 2⁵¹ rounds that number to an integer, held
/// in the low bits of the sum.
const SHIFT: f64 = 6_755_399_441_055_744.0;

/// 1/n! for n = 0..=14.
const INV_FACTORIAL: [f64; 15] = {
    let mut table = [1.0f64; 15];
    let mut n = 1;
    let mut factorial = 1.0f64;
    while n < 15 {
        factorial *= n as f64; // n! is exact in f64 for n ≤ 22
        table[n] = 1.0 / factorial;
        n += 1;
    }
    table
};

/// eᵘ − 1 for 0 ≤ u ≤ 44.
#[inline(always)]
fn exp_m1_small(u: f64) -> f64 {
    let shifted = u * std::f64::consts::LOG2_E + SHIFT;
    let k = shifted - SHIFT;
    let r = (u - k * LN2_HI) - k * LN2_LO;
    // 2ᵏ, built from k's bits in the low part of `shifted`.
    let k_bits = shifted.to_bits().wrapping_sub(SHIFT.to_bits());
    let scale = f64::from_bits(k_bits.wrapping_add(1023) << 52);
    // eʳ − 1 = r + r²·(1/2! + r/3! + … + r¹²/14!).
    let mut p = INV_FACTORIAL[14];
    let mut n = 13;
    while n >= 2 {
        p = p * r + INV_FACTORIAL[n];
        n -= 1;
    }
    let em1 = r + r * r * p;
    em1 * scale + (scale - 1.0)
}

/// The hyperbolic tangent of a double, within 3 ulp; odd, ±1 beyond ±22, NaN for NaN. Monotone
/// to within its error: neighbouring doubles may come out an ulp out of order (about 1% of them
/// near |x| = ln 2 / 4, where the reduction's k steps from 0 to 1), which no finite difference
/// resolves.
#[inline]
pub fn tanh(x: f64) -> f64 {
    let u = 2.0 * x.abs().min(22.0);
    let e = exp_m1_small(u);
    let t = e / (e + 2.0);
    if x.is_nan() { x } else { t.copysign(x) }
}

/// tanh of every value, in place: the loop the engine's tanh layers run. On x86-64 machines with
/// AVX2 it is compiled for AVX2 as well, four values at a time; that version does the same IEEE
/// operations on each value (no fused multiply-add), so its results are bit for bit the same.
pub fn tanh_in_place(values: &mut [f64]) {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx2") {
        // SAFETY: the CPU has just been found to support AVX2, all that the function requires.
        unsafe { tanh_in_place_avx2(values) };
        return;
    }
    tanh_loop(values);
}

#[inline(always)]
fn tanh_loop(values: &mut [f64]) {
    for v in values {
        *v = tanh(*v);
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn tanh_in_place_avx2(values: &mut [f64]) {
    tanh_loop(values);
}

#[cfg(test)]
mod tests {
    use super::*;

    /// |a − b| in units of b's last place.
    fn ulps(a: f64, b: f64) -> f64 {
        ((a - b) / (b.abs() * f64::EPSILON).max(f64::MIN_POSITIVE)).abs()
    }

    #[test]
    fn agrees_with_the_c_library_within_3_ulp() {
        // A xorshift stream; four ranges: around 0, where rounding is relative; the body; the
        // tails that round to ±1; the region of tiny arguments.
        let mut s: u64 = 0x9e37_79b9_7f4a_7c15;
        let mut worst = (0.0f64, 0.0f64);
        for i in 0..2_000_000 {
            s ^= s << 13;
            s ^= s >> 7;
            s ^= s << 17;
            let u = (s >> 11) as f64 / (1u64 << 53) as f64 - 0.5;
            let x = match i % 4 {
                0 => u * 2.0,
                1 => u * 12.0,
                2 => u * 100.0,
                _ => u * 1e-6,
            };
            let e = ulps(tanh(x), x.tanh());
            if e > worst.0 {
                worst = (e, x);
            }
        }
        assert!(worst.0 <= 3.0, "{} ulp at {:e}", worst.0, worst.1);
    }

    #[test]
    fn the_slice_version_matches_bit_for_bit() {
        let mut values: Vec<f64> = (0..4099)
            .map(|i| (f64::from(i) * 0.37).sin() * 9.0)
            .collect();
        values.extend([0.0, -0.0, f64::NAN, f64::INFINITY, -30.0, 1e-310]);
        let one_by_one: Vec<u64> = values.iter().map(|&v| tanh(v).to_bits()).collect();
        tanh_in_place(&mut values);
        let at_once: Vec<u64> = values.iter().map(|v| v.to_bits()).collect();
        assert_eq!(at_once, one_by_one);
    }

    #[test]
    fn special_values_and_symmetry() {
        assert_eq!(tanh(0.0).to_bits(), 0.0f64.to_bits());
        assert_eq!(tanh(-0.0).to_bits(), (-0.0f64).to_bits());
        assert_eq!(tanh(5e-324), 5e-324);
        assert_eq!(tanh(f64::INFINITY), 1.0);
        assert_eq!(tanh(f64::NEG_INFINITY), -1.0);
        assert_eq!(tanh(22.0), 1.0);
        assert_eq!(tanh(-1e300), -1.0);
        assert!(tanh(f64::NAN).is_nan());
        for i in 0..10_000 {
            let x = f64::from(i) * 1e-3;
            assert_eq!(tanh(-x), -tanh(x));
            // Monotone at the scale of any step a difference takes (not ulp by ulp).
            assert!(tanh(x + 1e-3) >= tanh(x), "not monotone at {x}");
        }
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
        // 2.3190468138462996e-17 (digits from memory; the two agree with each other, and the
        // exp_m1 below agrees with the C library's to an ulp, which a wrong split would break).
        let tail = (LN2_HI - std::f64::consts::LN_2) + LN2_LO;
        assert!(
            (tail - 2.319_046_813_846_299_6e-17).abs() < 2e-26,
            "{tail:e}"
        );
        let mut worst = 0.0f64;
        for i in 0..44_000 {
            let u = f64::from(i) * 1e-3;
            worst = worst.max(ulps(exp_m1_small(u), u.exp_m1()));
        }
        assert!(worst <= 2.0, "{worst} ulp");
    }
}
