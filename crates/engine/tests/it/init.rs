//! Initialisation scales against the published formulas.

use plumb_engine::{Activation, Init, Loss, Network, Rng};

/// Glorot & Bengio (AISTATS 2010): U(±√6/√(fan_in + fan_out)), variance 2/(fan_in + fan_out).
/// He et al. (ICCV 2015): variance 2/fan_in. LeCun et al. (1998): variance 1/fan_in.
/// U(−a, a) has standard deviation a/√3 [pub: any probability text].
#[test]
fn sample_spread_matches_the_formulas() {
    let net = Network::new(
        300,
        &[(200, Activation::Tanh), (10, Activation::Softmax)],
        Loss::CrossEntropy,
        0.0,
    )
    .unwrap();
    let (fan_in, fan_out) = (300.0f64, 200.0f64);
    for init in Init::ALL {
        let w = init.weights(&net, &mut Rng::new(99));
        let first = w.layer(0);
        assert!(
            first.column(0).iter().all(|&b| b == 0.0),
            "biases start at zero"
        );
        let vals: Vec<f64> = first.slice(ndarray::s![.., 1..]).iter().copied().collect();
        let n = vals.len() as f64;
        let mean = vals.iter().sum::<f64>() / n;
        let sd = (vals.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / n).sqrt();
        let want = match init {
            Init::GlorotUniform | Init::GlorotNormal => (2.0 / (fan_in + fan_out)).sqrt(),
            Init::HeUniform | Init::HeNormal => (2.0 / fan_in).sqrt(),
            Init::LecunNormal => (1.0 / fan_in).sqrt(),
        };
        // 60 000 draws: the sample sd is within 1% of σ with overwhelming probability.
        assert!((sd / want - 1.0).abs() < 0.01, "{init}: sd {sd} vs {want}");
        let max = vals.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        if init == Init::GlorotUniform {
            let limit = (6.0 / (fan_in + fan_out)).sqrt();
            assert!(max <= limit && max > 0.99 * limit, "{max} vs {limit}");
        }
        if init.is_uniform() {
            assert!(max <= 3f64.sqrt() * want + 1e-15);
        } else {
            assert!(
                max > 3.0 * want,
                "a normal sample this large reaches past 3σ"
            );
        }
    }
}
