//! Correct gradients of every kind pass the graph check: f64, f32 and the complex step.

use crate::graph_common;

use graph_common::*;
use plumb_fd::{Method, Precision, Settlement, Status};

#[test]
fn correct_gradients_of_every_kind_pass_in_f64_f32_and_complex_step() {
    for (name, build) in kinds() {
        for (method, precision) in [
            (Method::Central, Precision::F64),
            (Method::Central, Precision::F32),
            (Method::ComplexStep, Precision::F64),
            (Method::ComplexStep, Precision::F32),
            (Method::FivePoint, Precision::F64),
            (Method::Richardson, Precision::F64),
            (Method::Forward, Precision::F64),
        ] {
            let c = case(build(), 5, 3);
            let r = run(&c, &config(method, precision, 3));
            let (cm, dm) = count(&r, Status::Mismatch);
            assert_eq!(
                (cm, dm),
                (0, 0),
                "{name}, {method} {}: {}",
                precision.name(),
                worst(&r)
            );
            let settled = Settlement::of(r.coords.iter().map(|c| c.status));
            eprintln!(
                "{name}, {method} {}: {} coords, {} unsettled/unreliable, {} directions",
                precision.name(),
                settled.checked,
                settled.unsettled,
                r.directions.len()
            );
        }
    }
}

/// An attention key bias has a zero gradient by construction (it adds the same q·b to every
/// score of a query, which softmax ignores), so the loss does not move along it: its directions
/// compare round-off with round-off. They are judged against the network's gradient scale, as
/// its coordinates are, and settle as a match — not `unsettled` against a floor of round-off's
/// own size (what made the sequence net's f64 check inconclusive).
#[test]
fn directions_over_a_key_bias_settle_against_the_networks_scale() {
    let c = case(attention(), 4, 3);
    let mut cfg = config(Method::Central, Precision::F64, 3);
    cfg.directions = Some(2);
    let r = run(&c, &cfg);
    let keys: Vec<usize> = c
        .graph
        .tensors()
        .iter()
        .enumerate()
        .filter(|(_, t)| t.name.ends_with("key.bias"))
        .map(|(i, _)| i)
        .collect();
    assert_eq!(keys.len(), 2);
    for d in r
        .directions
        .iter()
        .filter(|d| d.tensor.is_some_and(|t| keys.contains(&t)))
    {
        assert!(d.analytic.abs() < 1e-12, "{d:?}");
        assert_eq!(d.status, Status::Match, "{d:?}");
    }
}

/// Token ids in an f32 check: f32 holds every integer up to 2²⁴ = 16,777,216 and not 2²⁴ + 1
/// (IEEE 754 binary32, a 24-bit significand), so a larger id would read another row of the
/// table, or one past its end. Such an id is refused, naming the sample and step; 2²⁴ itself is
/// held and checked, and f64 holds both.
#[test]
fn token_ids_f32_cannot_hold_are_refused_in_f32() {
    use ndarray::array;
    use plumb_engine::graph::{Dense, Embedding, Flatten, GraphBuilder, LossConfig, Shape};
    use plumb_engine::{Activation, Rng};
    use plumb_fd::{CheckConfig, CheckError, Sample, check_graph};
    let top = 1u32 << 24;
    let mut b = GraphBuilder::new(
        Shape::Tokens {
            steps: 2,
            vocabulary: top as usize + 4,
        },
        LossConfig::cross_entropy(),
    );
    b.push(None, Activation::Identity, |s| Embedding::new(1, s))
        .unwrap();
    b.push(None, Activation::Identity, Flatten::new).unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(2, s))
        .unwrap();
    let g = b.finish().unwrap();
    let params = random_params(&g, &mut Rng::new(1));
    let y = array![[1.0, 0.0]];
    let mut cfg = config(Method::Central, Precision::F32, 1);
    cfg.sample = Some(Sample::Total(6));
    cfg.directions = Some(0);
    let check = |id: u32, precision| {
        let x = array![[3.0, f64::from(id)]];
        let cfg = CheckConfig {
            precision,
            ..cfg.clone()
        };
        check_graph(&g, &params, x.view(), y.view(), &cfg, &|_, _| {})
    };
    match check(top + 1, Precision::F32) {
        Err(e @ CheckError::TokenBeyondF32 { .. }) => {
            assert_eq!(
                e,
                CheckError::TokenBeyondF32 {
                    sample: 0,
                    step: 1,
                    id: f64::from(top + 1)
                }
            );
            let said = e.to_string();
            assert!(
                said.contains("sample 1") && said.contains("step 2"),
                "{said}"
            );
        }
        other => panic!("{:?}", other.map(|r| r.coords.len())),
    }
    assert!(check(top, Precision::F32).is_ok());
    assert!(check(top + 1, Precision::F64).is_ok());
}
