//! The diagnosis names departures from the declared conventions: for every declared convention,
//! the gradient of a convention that differs in one key is named for that key, and the declared
//! convention's own gradient is not wrong at all. (The values here are the engine's; the same rule
//! against gradients written apart from the engine, in NumPy, is in tests/it/compare.rs.)

use std::path::Path;

use ndarray::ArrayD;
use plumb_diagnose::{Tolerances, judge_files};
use plumb_engine::graph::Role;
use plumb_engine::{Batch, Conventions, Init, L2Divisor, Reduction, Rng};
use plumb_formats::{AxisOrder, GraphDescription};

/// A 4 → 6 tanh → 3 softmax network with cross-entropy, λ = 0.2 and conventions `c`, its weights
/// in augmented matrices (each layer's bias column beside its weights, as the file holds them).
fn described(c: Conventions) -> GraphDescription {
    let text = format!(
        "inputs = 4\nlayout = \"augmented\"\nloss = \"cross-entropy\"\nl2 = 0.2\nreduction = \"{}\"\nl2-divisor = \"{}\"\nl2-on-bias = {}\n\n[[layer]]\nunits = 6\nactivation = \"tanh\"\n\n[[layer]]\nunits = 3\nactivation = \"softmax\"\n",
        c.reduction.name(),
        c.l2_divisor.name(),
        c.l2_on_bias
    );
    GraphDescription::parse(Path::new("conventions.toml"), &text).expect("a valid description")
}

fn every() -> Vec<Conventions> {
    let mut out = Vec::new();
    for reduction in Reduction::ALL {
        for l2_divisor in L2Divisor::ALL {
            for l2_on_bias in [false, true] {
                out.push(Conventions {
                    reduction,
                    l2_divisor,
                    l2_on_bias,
                });
            }
        }
    }
    out
}

#[test]
fn one_key_apart_is_named_for_that_key() {
    let base = described(every()[0]);
    let mut params = Init::GlorotUniform.graph_params(&base.graph, &mut Rng::new(8));
    // Biases away from zero, so that their decay shows.
    for (p, t) in params.iter_mut().zip(base.graph.tensors()) {
        if t.spec.role == Role::Bias {
            p.fill(0.3);
        }
    }
    let batch = Batch::graph_synthetic(&base.graph, 9, 8);
    let (x, y) = (batch.x.view(), batch.y.view());
    let tol = |_: &str| Tolerances::for_precision(false);
    let gradient =
        |d: &GraphDescription| -> Vec<ArrayD<f64>> { d.graph.gradient(&params, x, y, None).params };
    for declared in every() {
        let desc = described(declared);
        let judged = |g: &[ArrayD<f64>]| {
            let outside = desc.to_file(g).unwrap();
            assert_eq!(outside.len(), 2, "one augmented matrix per layer");
            judge_files(
                &desc,
                &params,
                x,
                y,
                AxisOrder::ChannelsFirst,
                &outside,
                &tol,
            )
            .unwrap()
        };
        assert!(
            judged(&gradient(&desc)).iter().all(|j| j.matches),
            "{declared:?}: its own gradient"
        );
        for other in every() {
            let differs = [
                declared.reduction != other.reduction,
                declared.l2_divisor != other.l2_divisor,
                declared.l2_on_bias != other.l2_on_bias,
            ];
            if differs.iter().filter(|d| **d).count() != 1 {
                continue;
            }
            let want = if differs[0] {
                match declared.reduction {
                    Reduction::Mean => "missing-batch-mean",
                    Reduction::Sum => "double-batch-mean",
                }
            } else if differs[1] {
                "regularization-unscaled"
            } else {
                "bias-regularized"
            };
            for j in judged(&gradient(&described(other))) {
                let d = j.diagnosis.as_ref().expect("wrong");
                assert_eq!(
                    d.code, want,
                    "declared {declared:?}, written {other:?}: {d:?}"
                );
            }
        }
    }
}
