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
