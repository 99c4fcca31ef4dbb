//! Figures that stay finite for any finite input. A weight file read with the wrong byte order holds
//! values up to 1e300, whose squares overflow: every sum of squares here is taken over values divided
//! by the largest |value| first, and that scale multiplied back at the end.

/// The largest |v| over the finite values (0 when there are none).
pub fn largest(values: impl IntoIterator<Item = f64>) -> f64 {
    values
        .into_iter()
        .filter(|v| v.is_finite())
        .fold(0.0, |m, v| m.max(v.abs()))
}

/// The Euclidean norm of the finite values, without overflow.
pub fn norm(values: &[f64]) -> f64 {
    let scale = largest(values.iter().copied());
    if scale == 0.0 {
        return 0.0;
    }
    let sum: f64 = values
        .iter()
        .filter(|v| v.is_finite())
        .map(|v| (v / scale) * (v / scale))
        .sum();
    scale * sum.sqrt()
}

/// Mean, standard deviation (population) and kurtosis of the finite values.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Moments {
    pub mean: f64,
    pub std: f64,
    /// E[(x − μ)⁴] / σ⁴: 1.8 for a uniform, 3 for a normal distribution; 3 when σ = 0.
    pub kurtosis: f64,
}

pub fn moments(values: &[f64]) -> Moments {
    moments_of(|| values.iter().copied())
}

/// [`moments`] of values read afresh from `values()` on each of its passes, in the same order and
/// with the same sums, so that a large tensor (or an f32 one, widened on the fly) is not copied.
pub fn moments_of<I: Iterator<Item = f64>>(values: impl Fn() -> I) -> Moments {
    moments_in(values, true)
}

/// The standard deviation of [`moments_of`], the same bits, without the pass the kurtosis takes.
pub fn std_of<I: Iterator<Item = f64>>(values: impl Fn() -> I) -> f64 {
    moments_in(values, false).std
}

/// Three passes (the largest |v|; count and sum; the squares), and a fourth for the kurtosis
/// when asked (NaN when not).
fn moments_in<I: Iterator<Item = f64>>(values: impl Fn() -> I, kurtosis: bool) -> Moments {
    let scale = largest(values());
    let x = || {
        values()
            .filter(|v| v.is_finite())
            .map(move |v| if scale > 0.0 { v / scale } else { 0.0 })
    };
    // -0.0 is where `Iterator::sum` of f64 starts.
    let (count, sum) = x().fold((0usize, -0.0f64), |(c, s), v| (c + 1, s + v));
    let n = count.max(1) as f64;
    let mean = sum / n;
    let var = x().map(|v| (v - mean).powi(2)).sum::<f64>() / n;
    let kurtosis = if !kurtosis {
        f64::NAN
    } else if var > 0.0 {
        x().map(|v| (v - mean).powi(4)).sum::<f64>() / n / (var * var)
    } else {
        3.0
    };
    Moments {
        mean: mean * scale,
        std: var.sqrt() * scale,
        kurtosis,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // By hand: {3, 4} has norm 5; scaled by 1e300 the squares overflow an unscaled sum, not this one.
    #[test]
    fn norms_and_spreads_of_huge_values_stay_finite() {
        assert_eq!(norm(&[3.0, 4.0]), 5.0);
        let n = norm(&[3e300, 4e300]);
        assert!((n / 5e300 - 1.0).abs() < 1e-15, "{n}");
        // {−a, a}: mean 0, σ = a, kurtosis 1 (two points), for a = 1 and a = 1e300 alike.
        for a in [1.0, 1e300] {
            let m = moments(&[-a, a]);
            assert_eq!(m.mean, 0.0);
            assert!((m.std / a - 1.0).abs() < 1e-15);
            assert!((m.kurtosis - 1.0).abs() < 1e-12);
        }
        assert_eq!(moments(&[2.0, 2.0]).std, 0.0);
        assert_eq!(norm(&[0.0, f64::NAN]), 0.0);
    }
}
