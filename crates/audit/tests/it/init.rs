//! The initialisation tests against the published scales (Glorot & Bengio 2010,
//! He et al. 2015, LeCun et al. 1998), through the Kolmogorov–Smirnov test (NR §14.3).

use std::path::Path;

use plumb_audit::{ks_test, q_ks, scheme_cdf, tensor_init};
use plumb_engine::{Init, Rng};
use plumb_formats::GraphDescription;

/// A layer with fan-in 40 and fan-out 400: Glorot σ = √(2/440) ≈ 0.067, He σ = √(2/40) ≈ 0.224,
/// LeCun σ = √(1/40) ≈ 0.158 — Glorot is more than 2× from the other two.
fn draw(scheme: Init, seed: u64) -> Vec<f64> {
    let text = "inputs = 40\nloss = \"cross-entropy\"\n[[layer]]\nunits = 400\nactivation = \"relu\"\n[[layer]]\nunits = 2\nactivation = \"softmax\"\n";
    let desc = GraphDescription::parse(Path::new("draw.toml"), text).unwrap();
    let params = scheme.graph_params(&desc.graph, &mut Rng::new(seed));
    // Layer 1's weight, 400 × 40, without its bias.
    params[0].iter().copied().collect()
}

fn p(values: &[f64], scheme: Init) -> f64 {
    ks_test(values, scheme_cdf(scheme, 40, 400)).1
}

/// The schemes' CDFs at multiples of σ against the standard normal's Φ (Abramowitz & Stegun,
/// table 26.1, quoted from memory to 7 decimals; checked a second way with Python's
/// `0.5 * math.erfc(-k / math.sqrt(2))`, which gives 0.8413447460685429, 0.9750021048517795,
/// 0.006209665325776139 and 9.865876450377012e-10) and the uniform's (k·σ on [−√3σ, √3σ]).
#[test]
fn scheme_cdfs_are_the_normal_and_uniform_distributions() {
    let (fan_in, fan_out) = (40, 400);
    let normal = Init::GlorotNormal;
    let sd = normal.std_dev(fan_in, fan_out);
    let cdf = scheme_cdf(normal, fan_in, fan_out);
    for (k, phi) in [
        (1.0, 0.8413447),
        (1.96, 0.9750021),
        (-2.5, 0.0062097),
        (0.0, 0.5),
    ] {
        assert!((cdf(k * sd) - phi).abs() < 5e-8, "Φ({k}) = {}", cdf(k * sd));
    }
    // The far tail keeps its relative accuracy (1 − erf would give 0 or a few ulp of 1 here).
    let tail = cdf(-6.0 * sd);
    assert!(
        (tail / 9.865876450377012e-10 - 1.0).abs() < 1e-12,
        "Φ(−6) = {tail}"
    );
    let uniform = Init::GlorotUniform;
    let sd = uniform.std_dev(fan_in, fan_out);
    let cdf = scheme_cdf(uniform, fan_in, fan_out);
    let a = 3f64.sqrt() * sd;
    assert_eq!(cdf(-a), 0.0);
    assert_eq!(cdf(a), 1.0);
    assert_eq!(cdf(-2.0 * a), 0.0);
    assert_eq!(cdf(0.0), 0.5);
    assert!((cdf(sd) - (0.5 + 1.0 / (2.0 * 3f64.sqrt()))).abs() < 1e-15);
}

#[test]
fn each_scheme_passes_its_own_test_at_the_one_percent_level() {
    for scheme in Init::ALL {
        for seed in [1, 2, 3] {
            let v = draw(scheme, seed);
            assert!(
                p(&v, scheme) >= 0.01,
                "{scheme} seed {seed}: p = {}",
                p(&v, scheme)
            );
        }
    }
}

#[test]
fn false_rejections_over_200_seeds_stay_near_one_percent() {
    // 200 seeds × 5 schemes = 1000 tests at level 1%: 10 rejections expected; the binomial
    // standard deviation is √(1000 · 0.01 · 0.99) ≈ 3.1, so 0 to 22 is within four of them.
    let mut rejected = 0;
    for scheme in Init::ALL {
        for seed in 100..300 {
            let v = draw(scheme, seed);
            if p(&v, scheme) < 0.01 {
                rejected += 1;
            }
        }
    }
    assert!(rejected <= 22, "{rejected} of 1000 rejected");
}

#[test]
fn schemes_whose_scales_differ_by_2x_or_more_are_rejected() {
    let glorot = [Init::GlorotUniform, Init::GlorotNormal];
    let others = [Init::HeUniform, Init::HeNormal, Init::LecunNormal];
    for seed in [1, 2, 3] {
        for g in glorot {
            for o in others {
                let sg = g.std_dev(40, 400);
                let so = o.std_dev(40, 400);
                assert!(so / sg >= 2.0, "the premise: {o} vs {g}");
                assert!(p(&draw(g, seed), o) < 0.01, "{g} data passes as {o}");
                assert!(p(&draw(o, seed), g) < 0.01, "{o} data passes as {g}");
            }
        }
    }
}

/// Without a claim, the closest scheme by scale and shape is reported.
#[test]
fn the_closest_scheme_is_named() {
    for scheme in Init::ALL {
        let v = draw(scheme, 9);
        // Fan-in 40, fan-out 400, ReLU units (He's scale is the reference).
        let li = tensor_init(1, "layer1", &v, (40, 400), true, None, 0.01);
        // Uniform and normal draws of one family share σ; the kurtosis tells them apart.
        assert_eq!(li.closest, scheme.name(), "{scheme}");
        assert!((li.ratio - 1.0).abs() < 0.02, "{scheme}: {}", li.ratio);
    }
}

/// A second method for the Kolmogorov tail's critical values (recalled in the unit tests): the
/// rate at which uniform samples are rejected at λ = 1.358 is 5%, Monte Carlo over 2000 samples of
/// 200 (standard error ≈ 0.5%).
#[test]
fn the_tail_matches_a_monte_carlo_of_the_statistic() {
    let mut rng = Rng::new(77);
    let n = 200;
    let trials = 2000;
    let mut over = 0;
    for _ in 0..trials {
        let v: Vec<f64> = (0..n).map(|_| rng.uniform()).collect();
        let (d, _) = ks_test(&v, |x| x.clamp(0.0, 1.0));
        let sn = (n as f64).sqrt();
        if (sn + 0.12 + 0.11 / sn) * d > 1.358 {
            over += 1;
        }
    }
    let rate = over as f64 / trials as f64;
    assert!((rate - 0.05).abs() < 0.015, "{rate}");
    assert!((q_ks(1.358) - 0.05).abs() < 5e-4);
}
