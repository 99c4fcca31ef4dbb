//! The number type the engine computes in.
//!
//! One engine, many scalars: f64 for the reference, f32 to check at single precision, a complex number
//! for the complex-step derivative, and a dual number (feature `dual`) for an independent exact
//! gradient in tests. Every branch the engine takes (ReLU's side, the shift of a log-sum-exp) looks
//! at the real part only, so the perturbation a complex or dual number carries is never branched on.

use std::fmt::Debug;
use std::ops::{AddAssign, MulAssign, Neg, SubAssign};

use ndarray::LinalgScalar;
use num_complex::Complex;

/// The arithmetic the engine needs of its numbers.
pub trait Scalar:
    LinalgScalar + Neg<Output = Self> + AddAssign + SubAssign + MulAssign + Debug + Send + Sync
{
    /// Embeds a real constant (data, a hyper-parameter) with no perturbation part.
    fn from_f64(x: f64) -> Self;
    /// The real part, used for every comparison and branch.
    fn re(self) -> f64;
    fn exp(self) -> Self;
    fn exp_m1(self) -> Self;
    fn ln(self) -> Self;
    fn ln_1p(self) -> Self;
    fn tanh(self) -> Self;
    /// tanh of every value in place (f64 and f32 have faster loops than one call per value).
    fn tanh_all(values: &mut [Self]) {
        for v in values {
            *v = v.tanh();
        }
    }
    /// eˣ of every value in place (f64 and f32 have faster loops than one call per value).
    fn exp_all(values: &mut [Self]) {
        for v in values {
            *v = v.exp();
        }
    }
    /// ln of every value in place (f64 and f32 have faster loops than one call per value).
    fn ln_all(values: &mut [Self]) {
        for v in values {
            *v = v.ln();
        }
    }
    /// The logistic function of every value in place, bit for bit what the engine's `sigmoid`
    /// gives on each (f64 and f32 have faster loops).
    fn sigmoid_all(values: &mut [Self]) {
        for v in values {
            *v = crate::activation::sigmoid(*v);
        }
    }
    /// The machine epsilon of the underlying real type.
    fn epsilon() -> f64;
    /// Whether two values are the same bits (`==` calls −0 and +0 equal, and a NaN unequal to
    /// itself): a pass that meets its base pass's values bit for bit goes on as the base did.
    fn same_bits(self, other: Self) -> bool;
}

macro_rules! real_scalar {
    ($t:ty, $exp:path, $ln:path, $tanh:path $(, $extra:item)*) => {
        impl Scalar for $t {
            #[inline]
            fn from_f64(x: f64) -> Self {
                x as $t
            }
            #[inline]
            fn re(self) -> f64 {
                self as f64
            }
            #[inline]
            fn exp(self) -> Self {
                $exp(self)
            }
            #[inline]
            fn exp_m1(self) -> Self {
                <$t>::exp_m1(self)
            }
            #[inline]
            fn ln(self) -> Self {
                $ln(self)
            }
            #[inline]
            fn ln_1p(self) -> Self {
                <$t>::ln_1p(self)
            }
            #[inline]
            fn tanh(self) -> Self {
                $tanh(self)
            }
            #[inline]
            fn epsilon() -> f64 {
                <$t>::EPSILON as f64
            }
            #[inline]
            fn same_bits(self, other: Self) -> bool {
                self.to_bits() == other.to_bits()
            }
            $($extra)*
        }
    };
}

// exp, ln and tanh of f64 and f32 are the engine's own (elementary/): a finite-difference check
// spends most of its time there, and an f32 check must not cost more than an f64 one.
real_scalar!(
    f64,
    crate::elementary::exp,
    crate::elementary::ln,
    crate::elementary::tanh,
    fn tanh_all(values: &mut [Self]) {
        crate::elementary::tanh_in_place(values)
    },
    fn exp_all(values: &mut [Self]) {
        crate::elementary::exp_in_place(values)
    },
    fn ln_all(values: &mut [Self]) {
        crate::elementary::ln_in_place(values)
    },
    fn sigmoid_all(values: &mut [Self]) {
        crate::elementary::sigmoid_in_place(values)
    }
);
real_scalar!(
    f32,
    crate::elementary::exp_f32,
    crate::elementary::ln_f32,
    crate::elementary::tanh_f32,
    fn tanh_all(values: &mut [Self]) {
        crate::elementary::tanh_in_place_f32(values)
    },
    fn exp_all(values: &mut [Self]) {
        crate::elementary::exp_in_place_f32(values)
    },
    fn ln_all(values: &mut [Self]) {
        crate::elementary::ln_in_place_f32(values)
    },
    fn sigmoid_all(values: &mut [Self]) {
        crate::elementary::sigmoid_in_place_f32(values)
    }
);

macro_rules! complex_scalar {
    ($t:ty) => {
        impl Scalar for Complex<$t> {
            #[inline]
            fn from_f64(x: f64) -> Self {
                Complex::new(x as $t, 0.0)
            }
            #[inline]
            fn re(self) -> f64 {
                self.re as f64
            }
            #[inline]
            fn exp(self) -> Self {
                Complex::exp(self)
            }
            #[inline]
            fn exp_m1(self) -> Self {
                // exp(a+ib) − 1 with the real part kept accurate for small a (the complex step uses
                // tiny imaginary parts, so the real part must not lose digits to cancellation).
                let (s, c) = self.im.sin_cos();
                let ea = self.re.exp();
                let half = (self.im / 2.0).sin();
                Complex::new(self.re.exp_m1() * c - 2.0 * half * half, ea * s)
            }
            #[inline]
            fn ln(self) -> Self {
                Complex::ln(self)
            }
            #[inline]
            fn ln_1p(self) -> Self {
                // ln(1 + z) = ln|1 + z| + i·arg(1 + z), with ln|1 + z| from ln_1p of the real parts.
                let (x, y) = (self.re, self.im);
                let re = 0.5 * (x * (2.0 + x) + y * y).ln_1p();
                Complex::new(re, y.atan2(1.0 + x))
            }
            #[inline]
            fn tanh(self) -> Self {
                // tanh z = (1 − e^{−2z}) / (1 + e^{−2z}) for Re z ≥ 0 (odd symmetry otherwise): stays
                // finite where the textbook sinh/cosh quotient overflows.
                if self.re >= 0.0 {
                    let e = (-(self + self)).exp();
                    (Complex::new(1.0, 0.0) - e) / (Complex::new(1.0, 0.0) + e)
                } else {
                    -Scalar::tanh(-self)
                }
            }
            #[inline]
            fn epsilon() -> f64 {
                <$t>::EPSILON as f64
            }
            #[inline]
            fn same_bits(self, other: Self) -> bool {
                self.re.to_bits() == other.re.to_bits() && self.im.to_bits() == other.im.to_bits()
            }
        }
    };
}

complex_scalar!(f64);
complex_scalar!(f32);

#[cfg(feature = "dual")]
impl Scalar for num_dual::Dual64 {
    #[inline]
    fn from_f64(x: f64) -> Self {
        num_dual::Dual64::from_re(x)
    }
    #[inline]
    fn re(self) -> f64 {
        self.re
    }
    #[inline]
    fn exp(self) -> Self {
        num_dual::DualNum::exp(&self)
    }
    #[inline]
    fn exp_m1(self) -> Self {
        num_dual::DualNum::exp_m1(&self)
    }
    #[inline]
    fn ln(self) -> Self {
        num_dual::DualNum::ln(&self)
    }
    #[inline]
    fn ln_1p(self) -> Self {
        num_dual::DualNum::ln_1p(&self)
    }
    #[inline]
    fn tanh(self) -> Self {
        num_dual::DualNum::tanh(&self)
    }
    #[inline]
    fn epsilon() -> f64 {
        f64::EPSILON
    }
    #[inline]
    fn same_bits(self, other: Self) -> bool {
        self.re.to_bits() == other.re.to_bits() && self.eps.to_bits() == other.eps.to_bits()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Identities checked against the real functions: for a purely real complex number the complex
    // forms must agree with f64 to rounding (same functions, different formulas).
    #[test]
    fn complex_forms_agree_with_real_ones_on_the_real_axis() {
        for &x in &[-30.0f64, -3.0, -0.5, -1e-9, 0.0, 1e-9, 0.7, 4.0, 30.0] {
            let z = Complex::new(x, 0.0);
            assert!((Scalar::tanh(z).re - x.tanh()).abs() <= 1e-15 * (1.0 + x.tanh().abs()));
            assert!((Scalar::exp_m1(z).re - x.exp_m1()).abs() <= 1e-15 * (1.0 + x.exp_m1().abs()));
            if x > -1.0 {
                assert!((Scalar::ln_1p(z).re - x.ln_1p()).abs() <= 1e-15 * (1.0 + x.ln_1p().abs()));
            }
        }
    }

    // The complex step (Squire & Trapp 1998): Im f(x + ih)/h equals f'(x) to rounding. Checked here
    // for the three functions whose complex forms we wrote by hand, against their closed-form
    // derivatives (tanh' = 1 − tanh², expm1' = exp, ln1p' = 1/(1+x)).
    #[test]
    fn hand_written_complex_forms_carry_the_right_derivative() {
        let h = 1e-30;
        for &x in &[-2.5f64, -0.3, 0.0, 0.4, 3.0] {
            let z = Complex::new(x, h);
            let dt = Scalar::tanh(z).im / h;
            assert!((dt - (1.0 - x.tanh().powi(2))).abs() < 1e-15);
            let de = Scalar::exp_m1(z).im / h;
            assert!((de - x.exp()).abs() < 1e-15 * x.exp());
            if x > -1.0 {
                // ln(1 + x) is real only for x > −1, the only range the engine uses it on.
                let dl = Scalar::ln_1p(z).im / h;
                assert!((dl - 1.0 / (1.0 + x)).abs() < 1e-14);
            }
        }
    }
}
