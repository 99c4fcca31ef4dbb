//! The sequence kinds' forward passes against their published equations, written out here
//! directly in f64 (an independent formulation of each), and f32 against f64.
//!
//! - LSTM with a forget gate: Hochreiter & Schmidhuber 1997, forget gate by Gers, Schmidhuber &
//!   Cummins 2000: c = f⊙c₋ + i⊙g, h = o⊙tanh c (no peepholes).
//! - GRU: Cho et al. 2014, h = (1 − z)⊙n + z⊙h₋ with the reset applied after or before the
//!   recurrent product (DESIGN §4.2).
//! - Scaled dot-product attention: Vaswani et al. 2017, softmax(Q Kᵀ / √d) V per head.

use ndarray::{Array2, ArrayD, IxDyn};
use plumb_engine::graph::{Attention, Graph, GraphBuilder, Gru, LossConfig, Lstm, Shape};
use plumb_engine::{Activation, Rng};

fn sigmoid(v: f64) -> f64 {
    1.0 / (1.0 + (-v).exp())
}

fn one_layer(input: Shape, build: impl FnOnce(&mut GraphBuilder)) -> Graph {
    let mut b = GraphBuilder::new(input, LossConfig::squared_error());
    build(&mut b);
    b.finish().unwrap()
}

fn close(a: f64, b: f64, what: &str) {
    assert!(
        (a - b).abs() <= 1e-14 * b.abs().max(1.0),
        "{what}: {a} vs {b}"
    );
}

/// One unit, one input feature, three steps; the weights of each gate placed in the block the
/// declared order "gofi" gives it.
#[test]
fn lstm_with_forget_gate_follows_the_published_recurrence() {
    let xs = [0.7, -1.2, 0.4];
    // Per gate (i, f, g, o): input weight, recurrent weight, bias.
    let gate = [
        (0.5, -0.3, 0.1),
        (0.8, 0.2, 1.0),
        (-0.6, 0.9, 0.0),
        (0.3, 0.4, -0.2),
    ];
    let order = "gofi";
    let g = one_layer(Shape::Sequence { steps: 3, width: 1 }, |b| {
        b.push(None, Activation::Identity, |s| {
            Lstm::new(1, order, "all", s)
        })
        .unwrap();
    });
    let block = |letter| order.find(letter).unwrap();
    let mut w = ArrayD::zeros(IxDyn(&[4, 1]));
    let mut u = ArrayD::zeros(IxDyn(&[4, 1]));
    let mut bias = ArrayD::zeros(IxDyn(&[4]));
    for (letter, &(wi, ui, bi)) in "ifgo".chars().zip(&gate) {
        let k = block(letter);
        w[[k, 0]] = wi;
        u[[k, 0]] = ui;
        bias[[k]] = bi;
    }
    let x = Array2::from_shape_vec((1, 3), xs.to_vec()).unwrap();
    let out = g.forward(&[w, u, bias], x.view()).output().clone();
    let (mut h, mut c) = (0.0, 0.0);
    for (t, &xt) in xs.iter().enumerate() {
        let a = |k: usize| gate[k].0 * xt + gate[k].1 * h + gate[k].2;
        let (i, f, gg, o) = (sigmoid(a(0)), sigmoid(a(1)), a(2).tanh(), sigmoid(a(3)));
        c = f * c + i * gg;
        h = o * c.tanh();
        close(out[[0, t]], h, &format!("step {t}"));
    }
}

#[test]
fn gru_follows_the_published_recurrence_with_either_reset() {
    let xs = [0.9, -0.5, 1.3];
    // Per gate (r, z, n): input weight, recurrent weight, input bias, recurrent bias.
    let gate = [
        (0.4, -0.7, 0.1, 0.2),
        (-0.3, 0.5, -0.1, 0.3),
        (1.1, 0.6, 0.05, -0.4),
    ];
    let order = "nzr";
    for reset in ["after", "before"] {
        let g = one_layer(Shape::Sequence { steps: 3, width: 1 }, |b| {
            b.push(None, Activation::Identity, |s| {
                Gru::new(1, order, reset, "all", s)
            })
            .unwrap();
        });
        let mut p: Vec<ArrayD<f64>> = vec![
            ArrayD::zeros(IxDyn(&[3, 1])),
            ArrayD::zeros(IxDyn(&[3, 1])),
            ArrayD::zeros(IxDyn(&[3])),
            ArrayD::zeros(IxDyn(&[3])),
        ];
        for (letter, &(wi, ui, bi, bri)) in "rzn".chars().zip(&gate) {
            let k = order.find(letter).unwrap();
            p[0][[k, 0]] = wi;
            p[1][[k, 0]] = ui;
            p[2][[k]] = bi;
            p[3][[k]] = bri;
        }
        let x = Array2::from_shape_vec((1, 3), xs.to_vec()).unwrap();
        let out = g.forward(&p, x.view()).output().clone();
        let mut h: f64 = 0.0;
        for (t, &xt) in xs.iter().enumerate() {
            let gate_of = |k: usize| gate[k].0 * xt + gate[k].2 + gate[k].1 * h + gate[k].3;
            let (r, z) = (sigmoid(gate_of(0)), sigmoid(gate_of(1)));
            let (wn, un, bn, brn) = gate[2];
            let n = if reset == "after" {
                (wn * xt + bn + r * (un * h + brn)).tanh()
            } else {
                (wn * xt + bn + un * (r * h) + brn).tanh()
            };
            h = (1.0 - z) * n + z * h;
            close(out[[0, t]], h, &format!("{reset} step {t}"));
        }
    }
}

/// Identity projections and zero biases: the layer's output is softmax(X_h X_hᵀ / √d) X_h per
/// head h (its contiguous block of d columns), with the causal mask or without.
#[test]
fn attention_is_scaled_dot_product_attention_per_head_block() {
    let mut rng = Rng::new(31);
    let (steps, width, heads) = (3, 4, 2);
    let d = width / heads;
    let xv = Array2::from_shape_fn((steps, width), |_| rng.normal());
    for causal in [false, true] {
        let g = one_layer(Shape::Sequence { steps, width }, |b| {
            b.push(None, Activation::Identity, |s| {
                Attention::new(heads, causal, s)
            })
            .unwrap();
        });
        let eye = ArrayD::from_shape_fn(IxDyn(&[width, width]), |i| (i[0] == i[1]) as u8 as f64);
        let zero = ArrayD::zeros(IxDyn(&[width]));
        let p: Vec<ArrayD<f64>> = (0..4).flat_map(|_| [eye.clone(), zero.clone()]).collect();
        let x = xv
            .clone()
            .into_shape_with_order((1, steps * width))
            .unwrap();
        let out = g.forward(&p, x.view()).output().clone();
        for h in 0..heads {
            for a in 0..steps {
                let seen = if causal { a + 1 } else { steps };
                let score = |b: usize| {
                    (0..d)
                        .map(|j| xv[[a, h * d + j]] * xv[[b, h * d + j]])
                        .sum::<f64>()
                        / (d as f64).sqrt()
                };
                let e: Vec<f64> = (0..seen).map(|b| score(b).exp()).collect();
                let total: f64 = e.iter().sum();
                for j in 0..d {
                    let want: f64 = (0..seen).map(|b| e[b] / total * xv[[b, h * d + j]]).sum();
                    close(
                        out[[0, a * width + h * d + j]],
                        want,
                        &format!("causal {causal} head {h} step {a} column {j}"),
                    );
                }
            }
        }
        if causal {
            // The first step attends to itself alone: its output is its own value.
            for j in 0..width {
                close(out[[0, j]], xv[[0, j]], "causal step 0");
            }
        }
    }
}

/// f32's forward pass against f64's through embedding-free sequence kinds: each output is a
/// short chain of rounded sums, so 2e-5 of the output's scale is single precision (ε = 1.2e-7
/// times the terms summed); a wrong f32 path would be off by far more.
#[test]
fn f32_forward_agrees_with_f64_through_the_sequence_kinds() {
    for seed in 0..6u64 {
        let mut rng = Rng::new(900 + seed);
        let g = one_layer(Shape::Sequence { steps: 5, width: 4 }, |b| {
            b.push(None, Activation::Identity, |s| {
                Lstm::new(4, "ifgo", "all", s)
            })
            .unwrap();
            b.push(None, Activation::Identity, |s| Attention::new(2, true, s))
                .unwrap();
            b.push(None, Activation::Identity, |s| {
                Gru::new(3, "rzn", "before", "last", s)
            })
            .unwrap();
        });
        let params: Vec<ArrayD<f64>> = g
            .tensors()
            .iter()
            .map(|t| {
                let sd = 1.0 / (t.spec.fan_in as f64).sqrt();
                ArrayD::from_shape_fn(IxDyn(&t.spec.shape), |_| sd * rng.normal())
            })
            .collect();
        let x = Array2::from_shape_fn((3, 20), |_| rng.normal());
        let p32: Vec<ArrayD<f32>> = params.iter().map(|p| p.mapv(|v| v as f32)).collect();
        let t64 = g.forward(&params, x.view());
        let t32 = g.forward(&p32, x.mapv(|v| v as f32).view());
        for (j, (a, b)) in t64.outputs.iter().zip(&t32.outputs).enumerate() {
            let scale = a.iter().fold(0.0f64, |m, v| m.max(v.abs()));
            for (&u, &v) in a.iter().zip(b) {
                assert!(
                    (u - v as f64).abs() <= 2e-5 * scale.max(1.0),
                    "seed {seed} layer {j}: {u} vs {v}"
                );
            }
        }
    }
}
