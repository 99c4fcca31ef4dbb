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

/// A sample smaller than a tensor still reaches every gate block and every head (a mistake may
/// sit in one of them alone), told apart here by the place the report names (`gate i`, `head 1`),
/// and the count asked for stays exact. 20 seeds, `--sample` at a quarter of the parameters (a
/// plain draw per tensor then misses some block of an lstm weight about every other time).
#[test]
fn a_small_sample_reaches_every_gate_block_and_head() {
    use std::collections::{BTreeMap, BTreeSet};
    for (name, build) in [
        ("lstm", lstm as fn() -> plumb_engine::graph::Graph),
        ("attention", attention),
        ("embedding + gru", embedding),
    ] {
        for seed in 0..20 {
            let c = case(build(), 2, 300 + seed);
            let g = &c.graph;
            let total = g.parameters() / 4;
            let mut cfg = config(Method::Central, Precision::F64, seed);
            cfg.sample = Some(Sample::Total(total));
            let r = run(&c, &cfg);
            assert_eq!(r.coords.len(), total, "{name} seed {seed}");
            // The gate letter or head number of an entry, from the layer's own place name.
            let part = |t: usize, k: usize| {
                let node = &g.nodes()[g.tensors()[t].layer];
                let place = node.layer.locate(t - node.tensors().start, k);
                place
                    .split(", ")
                    .find(|p| p.starts_with("gate ") || p.starts_with("head "))
                    .map(String::from)
            };
            let mut seen: BTreeMap<usize, BTreeSet<String>> = BTreeMap::new();
            let mut quota: BTreeMap<usize, usize> = BTreeMap::new();
            for coord in &r.coords {
                let (t, k) = (coord.coord.tensor, coord.coord.index);
                *quota.entry(t).or_default() += 1;
                if let Some(p) = part(t, k) {
                    seen.entry(t).or_default().insert(p);
                }
            }
            for (t, spec) in g.tensors().iter().enumerate() {
                let size: usize = spec.spec.shape.iter().product();
                let all: BTreeSet<String> = (0..size).filter_map(|k| part(t, k)).collect();
                if all.len() < 2 || spec.name.ends_with("output.bias") {
                    continue;
                }
                let got = seen.get(&t).map_or(0, BTreeSet::len);
                assert_eq!(
                    got,
                    quota[&t].min(all.len()),
                    "{name} seed {seed}: {} ({} of {size} sampled)",
                    spec.name,
                    quota[&t]
                );
            }
        }
    }
}
