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
