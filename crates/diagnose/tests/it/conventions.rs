//! The diagnosis names departures from the declared conventions: for every declared convention,
//! the gradient of a convention that differs in one key is named for that key, and the declared
//! convention's own gradient is not wrong at all. (The values here are the engine's; the same rule
//! against gradients written apart from the engine, in NumPy, is in tests/it/compare.rs.)

use plumb_diagnose::{Expected, Problem, Tolerances, judge};
use plumb_engine::{
    Activation, Batch, Conventions, Init, L2Divisor, Loss, Network, Reduction, Rng, Weights,
};
use plumb_formats::Tensor;

fn tensors(w: &Weights<f64>) -> Vec<Tensor> {
    w.layers()
        .iter()
        .enumerate()
        .map(|(l, t)| {
            let (r, c) = t.dim();
            Tensor::new(
                format!("layer{}", l + 1),
                vec![r, c],
                t.iter().copied().collect(),
            )
        })
        .collect()
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
    let base = Network::new(
        4,
        &[(6, Activation::Tanh), (3, Activation::Softmax)],
        Loss::CrossEntropy,
        0.2,
    )
    .unwrap();
    let mut w = Init::GlorotUniform.weights(&base, &mut Rng::new(8));
    for l in w.layers_mut() {
        l.column_mut(0).fill(0.3);
    }
    let batch = Batch::synthetic(&base, 9, 8);
    let expected: Vec<Expected> = base
        .layers()
        .iter()
        .enumerate()
        .map(|(l, s)| Expected {
            name: format!("layer{}", l + 1),
            layer: l,
            shape: vec![s.units, s.inputs + 1],
            bias: false,
        })
        .collect();
    let tol = |_: &str| Tolerances::for_precision(false);
    for declared in every() {
        let net = base.clone().with_conventions(declared);
        let problem = Problem::new(&net, &w, &batch, &tensors);
        let own = judge(&problem, &problem.reference_tensors, &expected, &tol);
        assert!(
            own.iter().all(|j| j.matches),
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
            let g = base
                .clone()
                .with_conventions(other)
                .gradient(&w, batch.x.view(), batch.y.view())
                .1;
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
            for j in judge(&problem, &tensors(&g), &expected, &tol) {
                let d = j.diagnosis.as_ref().expect("wrong");
                assert_eq!(
                    d.code, want,
                    "declared {declared:?}, written {other:?}: {d:?}"
                );
            }
        }
    }
}
