//! The sequence kinds' health measures: lstm and gru gates saturated on nearly all steps and
//! samples, attention heads one-hot on nearly every query, embedding rows the probe data never
//! reads — each raised on a network built to have it and absent on a healthy one. Thresholds are
//! plumb's defaults (docs/audit.md): within 0.01 of the limit on at least 99% of the values.

use crate::graph_common;

use graph_common::{alarms, has, healthy, probe, run};
use ndarray::Array2;
use plumb_engine::graph::{
    Attention, Dense, Embedding, Graph, GraphBuilder, Gru, LossConfig, Lstm, Shape,
};
use plumb_engine::{Activation, Batch};
use plumb_report::{Finding, Severity};

fn sequence(steps: usize, width: usize) -> Shape {
    Shape::Sequence { steps, width }
}

fn findings<'a>(a: &'a plumb_audit::Audit, code: &str) -> Vec<&'a Finding> {
    a.findings.iter().filter(|f| f.code == code).collect()
}

/// An lstm of 4 units with its gate blocks stacked "fgio", then dense softmax.
fn lstm_net() -> Graph {
    let mut b = GraphBuilder::new(sequence(6, 3), LossConfig::cross_entropy());
    b.push(None, Activation::Identity, |s| {
        Lstm::new(4, "fgio", "last", s)
    })
    .unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(2, s))
        .unwrap();
    b.finish().unwrap()
}

// A bias of +20 on a forget unit keeps σ within 1e-8 of 1 whatever the input; −20 on an input
// unit keeps it near 0. The finding names the gate by its letter under the declared order.
#[test]
fn lstm_gates_saturated_on_every_step_are_found_by_letter() {
    let g = lstm_net();
    let batch = probe(&g, 50, 1);
    let mut p = healthy(&g, 2);
    let a = run(&g, &p, &batch);
    assert!(alarms(&a).is_empty(), "{:?}", a.findings);
    assert_eq!(a.inside.len(), 3, "gates i, f, o");
    // "fgio": block 0 is f, block 2 is i; tensor 2 is the bias (4 blocks × 4 units).
    p[2][[1]] = 20.0; // f, unit 2
    p[2][[2 * 4 + 3]] = -20.0; // i, unit 4
    let a = run(&g, &p, &batch);
    let f = findings(&a, "saturated-gate");
    assert_eq!(f.len(), 2, "{:?}", a.findings);
    let gate = |l: &str| f.iter().find(|f| f.figures["gate"] == l).copied();
    assert_eq!(gate("f").unwrap().figures["units"].to_string(), "[2]");
    assert_eq!(gate("i").unwrap().figures["units"].to_string(), "[4]");
    assert!(gate("o").is_none());
    assert_eq!(gate("f").unwrap().severity, Severity::Warning);
    assert_eq!(
        gate("f").unwrap().tensor.as_deref(),
        Some("layer1.input.weight")
    );
}

// gru in the order "nzr" with the reset before the product: an update gate bias of −20 pins z at
// 0 (the state is replaced every step); the reset gate stays healthy.
#[test]
fn gru_update_gate_saturated() {
    let mut b = GraphBuilder::new(sequence(5, 3), LossConfig::cross_entropy());
    b.push(None, Activation::Identity, |s| {
        Gru::new(3, "nzr", "before", "all", s)
    })
    .unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(2, s))
        .unwrap();
    let g = b.finish().unwrap();
    let batch = probe(&g, 40, 3);
    let mut p = healthy(&g, 4);
    assert!(!has(&run(&g, &p, &batch), "saturated-gate"));
    // Block 1 of "nzr" is z; tensor 2 is the input bias.
    p[2][[3]] = -20.0;
    let a = run(&g, &p, &batch);
    let f = findings(&a, "saturated-gate");
    assert_eq!(f.len(), 1, "{:?}", a.findings);
    assert_eq!(f[0].figures["gate"], "z");
    assert_eq!(f[0].figures["units"].to_string(), "[1]");
}

/// Attention (2 heads over width 4) and a per-step dense head under squared error.
fn attention_net(steps: usize, causal: bool) -> Graph {
    let mut b = GraphBuilder::new(sequence(steps, 4), LossConfig::squared_error());
    b.push(None, Activation::Identity, |s| Attention::new(2, causal, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| Dense::new(2, s))
        .unwrap();
    b.finish().unwrap()
}

// Query and key rows of head 1 (1-based; rows 0 and 1 of the width-4 projections) scaled by 30
// make its scores span hundreds, so its softmax rows are one-hot; head 2 stays spread.
#[test]
fn a_one_hot_head_is_found_and_a_spread_one_is_not() {
    for causal in [false, true] {
        let g = attention_net(6, causal);
        let batch = probe(&g, 30, 5);
        let mut p = healthy(&g, 6);
        let a = run(&g, &p, &batch);
        assert!(!has(&a, "one-hot-head"), "{:?}", a.findings);
        for t in [0, 2] {
            p[t].slice_mut(ndarray::s![0..2, ..])
                .mapv_inplace(|v| v * 30.0);
        }
        let a = run(&g, &p, &batch);
        let f = findings(&a, "one-hot-head");
        assert_eq!(f.len(), 1, "causal {causal}: {:?}", a.inside);
        assert_eq!(f[0].figures["heads"].to_string(), "[1]");
        // The fraction of head 1 is a direct count over the engine's attention weights.
        let trace = g.forward(&p, batch.x.view());
        let w = match &g.nodes()[0].layer.inside(batch.x.view(), &trace.steps[0])[0] {
            plumb_engine::graph::Inside::Attention { weights, .. } => weights.clone(),
            other => panic!("{other:?}"),
        };
        let first = usize::from(causal);
        let mut one_hot = 0;
        for i in 0..30 {
            for q in first..6 {
                let top = (0..6).map(|k| w[[i, 0, q, k]]).fold(0.0, f64::max);
                one_hot += usize::from(top > 0.99);
            }
        }
        let queries = 30 * (6 - first);
        assert_eq!(a.inside[0].fractions[0], one_hot as f64 / queries as f64);
    }
}

// A single step is one-hot by construction (one key to attend to), and so is a causal layer's
// first query: they are not evidence and do not raise the finding.
#[test]
fn queries_with_one_key_tell_nothing() {
    for causal in [false, true] {
        let g = attention_net(1, causal);
        let batch = probe(&g, 20, 7);
        let a = run(&g, &healthy(&g, 8), &batch);
        assert!(!has(&a, "one-hot-head"), "{:?}", a.findings);
        assert_eq!(a.inside[0].fractions, vec![0.0, 0.0]);
    }
}

/// Tokens of a vocabulary of 10 through an embedding of size 3 and a per-step dense head.
fn embedding_net() -> Graph {
    let mut b = GraphBuilder::new(
        Shape::Tokens {
            steps: 4,
            vocabulary: 10,
        },
        LossConfig::squared_error(),
    );
    b.push(None, Activation::Identity, |s| Embedding::new(3, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| Dense::new(2, s))
        .unwrap();
    b.finish().unwrap()
}

fn tokens(m: usize, below: usize) -> Batch {
    Batch {
        x: Array2::from_shape_fn((m, 4), |(i, t)| ((i * 4 + t) % below) as f64),
        y: Array2::zeros((m, 8)),
    }
}

// Ids 0–6 only: rows 7, 8 and 9 are never read — a note (the audit could not see them used), which
// does not fail the audit. Every id read: no note.
#[test]
fn embedding_rows_the_probe_never_reads_are_a_note() {
    let g = embedding_net();
    let p = healthy(&g, 9);
    let a = run(&g, &p, &tokens(20, 7));
    let f = findings(&a, "unused-rows");
    assert_eq!(f.len(), 1, "{:?}", a.findings);
    assert_eq!(f[0].severity, Severity::Note);
    assert_eq!(f[0].figures["tokens"].to_string(), "[7,8,9]");
    assert!(
        f[0].message.contains("(tokens 7–9) are never read"),
        "{}",
        f[0].message
    );
    assert_eq!(a.verdict, plumb_report::Verdict::Pass);
    let a = run(&g, &p, &tokens(20, 10));
    assert!(!has(&a, "unused-rows"), "{:?}", a.findings);
}
