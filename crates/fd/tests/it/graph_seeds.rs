//! No false alarm: the engine's own gradient of every kind is never called a mismatch, over 20
//! seeds per kind (weights, batch and sample), in f64, f32 and with the complex step. ReLU and
//! max-pool networks are among them; there a step that changes a branch makes a coordinate
//! `unreliable`, never a mismatch; one of them has weights on a grid and whole-number inputs, so
//! that max-pool windows tie.

use crate::graph_common;

use graph_common::*;
use plumb_fd::{Method, Precision, Sample, Status};

fn every_kind() -> Vec<Build> {
    let mut k = kinds();
    k.push(("pools1d", pools1d));
    k.push(("pools1d, ties", pools1d));
    k
}

/// The case of a seed; for "ties", weights on a grid of 1/4 and inputs whole numbers, so that
/// max-pool windows often hold equal values (exact in f32 and f64).
fn seeded(name: &str, build: fn() -> plumb_engine::graph::Graph, seed: u64) -> Case {
    let mut c = case(build(), 6, 100 + seed);
    if name.ends_with("ties") {
        for p in &mut c.params {
            p.mapv_inplace(|v| (4.0 * v).round() / 4.0);
        }
        c.x.mapv_inplace(f64::round);
    }
    c
}

fn over_seeds(method: Method, precision: Precision, sample: Option<usize>) {
    for (name, build) in every_kind() {
        let (mut unreliable, mut checked) = (0, 0);
        for seed in 0..20 {
            let c = seeded(name, build, seed);
            let mut cfg = config(method, precision, seed);
            cfg.sample = sample.map(|n| Sample::Total(n.min(c.graph.parameters())));
            let r = run(&c, &cfg);
            let (coords, directions) = count(&r, Status::Mismatch);
            assert_eq!(
                coords,
                0,
                "{name}, seed {seed}, {method} {}: {}",
                precision.name(),
                worst(&r)
            );
            assert_eq!(
                directions,
                0,
                "{name}, seed {seed}, {method} {}: {:?}",
                precision.name(),
                r.directions
                    .iter()
                    .filter(|d| d.status == Status::Mismatch)
                    .collect::<Vec<_>>()
            );
            unreliable += count(&r, Status::Unreliable).0;
            checked += r.coords.len();
        }
        eprintln!(
            "{name}, {method} {}: {checked} coordinates over 20 seeds, {unreliable} unreliable",
            precision.name()
        );
        if name.ends_with("ties") {
            assert!(unreliable > 0, "{name}: no tie met over 20 seeds");
        }
    }
}

#[test]
fn central_f64_over_twenty_seeds() {
    over_seeds(Method::Central, Precision::F64, None);
}

#[test]
fn central_f32_over_twenty_seeds() {
    over_seeds(Method::Central, Precision::F32, Some(40));
}

#[test]
fn complex_step_over_twenty_seeds() {
    over_seeds(Method::ComplexStep, Precision::F64, Some(40));
}
