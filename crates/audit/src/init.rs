//! Whether a layer's weights look drawn from an initialisation scheme: the Kolmogorov–Smirnov test
//! against the scheme's distribution (its normal or uniform CDF), with the p-value from the
//! Kolmogorov distribution, Q_KS(λ) = 2 Σ (−1)^{j−1} e^{−2j²λ²} at λ = (√n + 0.12 + 0.11/√n)·D
//! (Numerical Recipes, 2nd ed., §14.3). Scales from the published formulas (plumb_engine::Init).
//!
//! One test per layer at level α would reject a genuine file's layer with probability α each, so a
//! deep network would fail its own scheme often; the layers' p-values are corrected together by
//! Holm's step-down procedure (Holm, Scandinavian Journal of Statistics 6(2):65–70, 1979), which
//! keeps the chance of rejecting any genuine layer of the file at most α.

use plumb_engine::Init;
use serde::Serialize;

/// The KS statistic D = sup |F_n − F| of a sample against a CDF, and its p-value.
pub fn ks_test(values: &[f64], cdf: impl Fn(f64) -> f64) -> (f64, f64) {
    let mut x: Vec<f64> = values.iter().copied().filter(|v| v.is_finite()).collect();
    x.sort_by(f64::total_cmp);
    let n = x.len() as f64;
    if x.is_empty() {
        return (0.0, 1.0);
    }
    let d = x
        .iter()
        .enumerate()
        .map(|(i, &v)| {
            let f = cdf(v);
            ((i + 1) as f64 / n - f).max(f - i as f64 / n)
        })
        .fold(0.0f64, f64::max);
    let sn = n.sqrt();
    (d, q_ks((sn + 0.12 + 0.11 / sn) * d))
}

/// The Kolmogorov distribution's tail Q_KS(λ) (NR §14.3, eq. 14.3.7).
pub fn q_ks(lambda: f64) -> f64 {
    if lambda < 0.2 {
        return 1.0;
    }
    let mut sum = 0.0;
    let mut sign = 1.0;
    for j in 1..=100 {
        let term = sign * (-2.0 * (j * j) as f64 * lambda * lambda).exp();
        sum += term;
        if term.abs() < 1e-12 * sum.abs() {
            break;
        }
        sign = -sign;
    }
    (2.0 * sum).clamp(0.0, 1.0)
}

/// The CDF of a scheme's weights for a layer: uniform on [−a, a] with a = √3·σ, or normal with
/// mean 0 and σ, Φ(x/σ) = erfc(−x/(σ√2))/2 (erfc from the libm crate, a port of musl's, so the
/// far tails keep their relative accuracy where 1 − erf would round to 0).
pub fn scheme_cdf(init: Init, fan_in: usize, fan_out: usize) -> Box<dyn Fn(f64) -> f64> {
    let sd = init.std_dev(fan_in, fan_out);
    if init.is_uniform() {
        let a = 3f64.sqrt() * sd;
        Box::new(move |x| ((x + a) / (2.0 * a)).clamp(0.0, 1.0))
    } else {
        Box::new(move |x| 0.5 * libm::erfc(-x / (sd * std::f64::consts::SQRT_2)))
    }
}

/// A layer's weights against the schemes.
#[derive(Clone, Debug, Serialize)]
pub struct LayerInit {
    pub layer: usize,
    pub tensor: String,
    pub fan_in: usize,
    pub fan_out: usize,
    /// The sample standard deviation of the non-bias weights.
    pub std: f64,
    /// The scheme whose scale (and shape: uniform or normal, by the kurtosis) is closest.
    pub closest: &'static str,
    /// std over the closest scheme's σ.
    pub ratio: f64,
    /// The scheme the layer's activation calls for (He for ReLU-like units, Glorot otherwise), and
    /// std over its σ.
    pub reference: &'static str,
    pub reference_ratio: f64,
    /// With --init: the KS test against that scheme.
    pub test: Option<KsTest>,
}

#[derive(Clone, Debug, Serialize)]
pub struct KsTest {
    pub scheme: &'static str,
    pub statistic: f64,
    /// The layer's own p-value.
    pub p_value: f64,
    /// The p-value after Holm's correction across the layers tested ([`correct_across_layers`]).
    pub adjusted_p_value: f64,
    /// Whether the adjusted p-value is at least the level.
    pub passed: bool,
}

/// Holm's adjusted p-values (Holm 1979): with the m p-values sorted ascending, the i-th (from 1)
/// becomes max over j ≤ i of min(1, (m − j + 1)·p₍ⱼ₎); rejecting where the adjusted value is below
/// α is Holm's step-down test at family-wise level α.
pub fn holm(p: &[f64]) -> Vec<f64> {
    let m = p.len();
    let mut order: Vec<usize> = (0..m).collect();
    order.sort_by(|&a, &b| p[a].total_cmp(&p[b]));
    let mut out = vec![0.0; m];
    let mut running = 0.0f64;
    for (i, &k) in order.iter().enumerate() {
        running = running.max(((m - i) as f64 * p[k]).min(1.0));
        out[k] = running;
    }
    out
}

/// Corrects the layers' KS tests together (Holm) and decides each at level `alpha`.
pub fn correct_across_layers(layers: &mut [LayerInit], alpha: f64) {
    let tested: Vec<usize> = (0..layers.len())
        .filter(|&i| layers[i].test.is_some())
        .collect();
    let raw: Vec<f64> = tested
        .iter()
        .filter_map(|&i| layers[i].test.as_ref().map(|t| t.p_value))
        .collect();
    for (&i, adjusted) in tested.iter().zip(holm(&raw)) {
        if let Some(t) = layers[i].test.as_mut() {
            t.adjusted_p_value = adjusted;
            t.passed = adjusted >= alpha;
        }
    }
}

/// The figures of one weight tensor with (fan-in, fan-out) `fans`; `kinked` when the units it
/// feeds are ReLU-like (He's scale is then the reference, Glorot's otherwise).
pub fn tensor_init(
    layer: usize,
    tensor: &str,
    weights: &[f64],
    (fan_in, fan_out): (usize, usize),
    kinked: bool,
    claimed: Option<Init>,
    alpha: f64,
) -> LayerInit {
    let m = crate::robust::moments(weights);
    let std = m.std;
    // Uniform has kurtosis 1.8, the normal 3: split at 2.4.
    let uniform = m.kurtosis < 2.4;
    let closest = Init::ALL
        .into_iter()
        .filter(|i| i.is_uniform() == uniform || (!uniform && *i == Init::LecunNormal))
        .min_by(|a, b| {
            let da = (std / a.std_dev(fan_in, fan_out)).ln().abs();
            let db = (std / b.std_dev(fan_in, fan_out)).ln().abs();
            da.total_cmp(&db)
        })
        .unwrap_or(Init::GlorotUniform);
    let reference = if kinked {
        Init::HeNormal
    } else {
        Init::GlorotNormal
    };
    let test = claimed.map(|scheme| {
        let (statistic, p_value) = ks_test(weights, scheme_cdf(scheme, fan_in, fan_out));
        KsTest {
            scheme: scheme.name(),
            statistic,
            p_value,
            adjusted_p_value: p_value,
            passed: p_value >= alpha,
        }
    });
    LayerInit {
        layer,
        tensor: tensor.to_string(),
        fan_in,
        fan_out,
        std,
        closest: closest.name(),
        ratio: std / closest.std_dev(fan_in, fan_out),
        reference: reference.name(),
        reference_ratio: std / reference.std_dev(fan_in, fan_out),
        test,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // The Kolmogorov distribution's classical critical values [memory]: Q(1.358) ≈ 0.05,
    // Q(1.628) ≈ 0.01, Q(1.224) ≈ 0.10 — verified by a second method, a Monte Carlo of the KS
    // statistic's rejection rate, in tests/it/init.rs.
    #[test]
    fn kolmogorov_tail_at_its_critical_values() {
        assert!((q_ks(1.358) - 0.05).abs() < 5e-4, "{}", q_ks(1.358));
        assert!((q_ks(1.628) - 0.01).abs() < 2e-4, "{}", q_ks(1.628));
        assert!((q_ks(1.224) - 0.10).abs() < 1e-3, "{}", q_ks(1.224));
        assert_eq!(q_ks(0.0), 1.0);
    }

    // Holm's procedure by its definition, on p = (0.01, 0.04, 0.03, 0.005) with m = 4: sorted
    // 0.005, 0.01, 0.03, 0.04 are multiplied by 4, 3, 2, 1 → 0.02, 0.03, 0.06, 0.04, and a running
    // maximum keeps the order: 0.02, 0.03, 0.06, 0.06. At α = 0.05 the step-down test rejects the
    // first two and stops at 0.03 > 0.05/2, as the adjusted values say.
    #[test]
    fn holm_adjusts_by_its_step_down_definition() {
        let adj = holm(&[0.01, 0.04, 0.03, 0.005]);
        let want = [0.03, 0.06, 0.06, 0.02];
        for (a, w) in adj.iter().zip(want) {
            assert!((a - w).abs() < 1e-15, "{adj:?}");
        }
        assert_eq!(holm(&[0.9, 0.8]), vec![1.0, 1.0]);
        assert_eq!(holm(&[0.004]), vec![0.004]);
    }

    // The statistic by hand: for the sample {0.25, 0.75} against U(0, 1), F_n jumps 0 → ½ → 1 at
    // 0.25 and 0.75, so D = max(½ − 0.25, 0.25 − 0, 1 − 0.75, 0.75 − ½) = 0.25.
    #[test]
    fn ks_statistic_by_hand() {
        let (d, _) = ks_test(&[0.75, 0.25], |x| x.clamp(0.0, 1.0));
        assert!((d - 0.25).abs() < 1e-15);
    }
}
