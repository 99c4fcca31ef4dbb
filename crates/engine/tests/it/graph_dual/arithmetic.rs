//! The graph in other arithmetic: f32's forward pass against f64's, and the complex step through
//! every kind against the backward pass.

use ndarray::ArrayD;
use plumb_engine::graph::{
    BatchNorm, Conv, ConvSettings, Dense, GlobalAvgPool, GraphBuilder, LayerNorm, LossConfig,
    Padding, Pool, PoolKind, RmsNorm, Shape,
};
use plumb_engine::{Activation, Rng};

use super::{FLOOR, TOL};
use crate::graph_common::{random_params, random_x, random_y};

/// f32's forward pass against f64's: each output is a sum of at most a few hundred rounded terms
/// through a few layers, so agreement to 2e-5 of the output's scale is f32 precision
/// (ε = 1.2e-7, times the terms summed); a wrong f32 path would be off by far more.
#[test]
fn f32_forward_agrees_with_f64_to_single_precision() {
    for seed in 0..10u64 {
        let mut rng = Rng::new(500 + seed);
        let input = Shape::Signal {
            channels: 2,
            length: 12,
        };
        let mut b = GraphBuilder::new(input, LossConfig::cross_entropy());
        let mut s = ConvSettings::conv1d(4, 3);
        s.padding = Padding::Same;
        b.push(Some("c1"), Activation::Relu, |sh| Conv::new(&s, sh))
            .unwrap();
        b.push(None, Activation::Identity, |sh| BatchNorm::new(1e-5, sh))
            .unwrap();
        b.push(None, Activation::Identity, |sh| {
            Pool::new(PoolKind::Max, 1, [1, 2], [1, 2], sh)
        })
        .unwrap();
        b.push(None, Activation::Gelu, |sh| LayerNorm::new(1e-5, sh))
            .unwrap();
        b.push(None, Activation::Identity, GlobalAvgPool::new)
            .unwrap();
        b.push(None, Activation::Softmax, |sh| Dense::new(3, sh))
            .unwrap();
        let g = b.finish().unwrap();
        let params = random_params(&g, &mut rng);
        let x = random_x(&g, 4, &mut rng);
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

/// The complex step (Squire & Trapp 1998): Im J(θ + ih·e_k)/h is dJ/dθ_k to rounding for a real-
/// analytic J, so the graph's complex path (every kind, ReLU and max-pool branching on the real
/// part) must reproduce the analytic gradient at every coordinate.
#[test]
fn complex_step_through_the_graph_agrees_with_the_backward_pass() {
    use num_complex::Complex64;
    let mut rng = Rng::new(77);
    let mut b = GraphBuilder::new(
        Shape::Image {
            channels: 2,
            height: 5,
            width: 6,
        },
        LossConfig {
            l2: 0.2,
            ..LossConfig::cross_entropy()
        },
    );
    let mut c = ConvSettings::conv2d(3, [3, 2]);
    c.padding = Padding::Same;
    b.push(Some("c"), Activation::Relu, |s| Conv::new(&c, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| BatchNorm::new(1e-5, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| {
        Pool::new(PoolKind::Max, 2, [2, 2], [1, 2], s)
    })
    .unwrap();
    b.push(None, Activation::Tanh, |s| RmsNorm::new(1e-6, s))
        .unwrap();
    b.push(None, Activation::Identity, GlobalAvgPool::new)
        .unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(3, s))
        .unwrap();
    let g = b.finish().unwrap();
    let params = random_params(&g, &mut rng);
    let x = random_x(&g, 3, &mut rng);
    let y = random_y(&g, 3, &mut rng);
    let grad = g.gradient(&params, x.view(), y.view(), None);
    let h = 1e-30;
    let pc: Vec<ArrayD<Complex64>> = params
        .iter()
        .map(|p| p.mapv(|v| Complex64::new(v, 0.0)))
        .collect();
    let (xc, yc) = (
        x.mapv(|v| Complex64::new(v, 0.0)),
        y.mapv(|v| Complex64::new(v, 0.0)),
    );
    let scale = grad
        .params
        .iter()
        .flat_map(|t| t.iter())
        .fold(0.0f64, |m, v| m.max(v.abs()));
    for t in 0..params.len() {
        for k in 0..params[t].len() {
            let mut q = pc.clone();
            q[t].as_slice_mut().unwrap()[k].im = h;
            let d = g.loss(&q, xc.view(), yc.view()).im / h;
            let a = grad.params[t].as_slice().unwrap()[k];
            assert!(
                (d - a).abs() <= TOL * a.abs().max(d.abs()).max(FLOOR * scale),
                "{} [{k}]: complex step {d} vs {a}",
                g.tensors()[t].name
            );
        }
    }
}
