//! Where a smooth activation stops looking like its Taylor polynomial (`Activation::bends`,
//! `Graph::bent`): the radius of convergence of its series about z, the distance from z to the
//! nearest complex point where it is not analytic, checked against the singularities
//! themselves in complex arithmetic (num-complex) [pub: Euler's formula e^(iπ) = −1, any
//! complex-analysis text].

use ndarray::{ArrayD, IxDyn, array};
use num_complex::Complex64;
use plumb_engine::Activation;
use plumb_engine::graph::{Dense, GraphBuilder, LossConfig, Shape};

const PI: f64 = std::f64::consts::PI;

// The singularities the radii are measured to: tanh's pole at iπ/2 (cosh vanishes there), the
// logistic function's pole at iπ (1 + e^(−z) vanishes) and softplus's branch point at iπ
// (1 + eᶻ vanishes); a step short of them keeps the functions finite.
#[test]
fn the_radii_are_the_distances_to_the_singularities() {
    let at = |y: f64| Complex64::new(0.0, y);
    assert!(at(PI / 2.0).cosh().norm() < 1e-15);
    assert!((1.0 + (-at(PI)).exp()).norm() < 1e-15);
    assert!((1.0 + at(PI).exp()).norm() < 1e-15);
    assert!(at(0.9 * PI / 2.0).cosh().norm() > 0.1);
    assert!((1.0 + at(0.9 * PI).exp()).norm() > 0.1);
    // From a real z the nearest of them is at distance √(z² + c²): a move of just over half
    // of it bends, one just under does not, in either direction.
    for (act, c) in [
        (Activation::Tanh, PI / 2.0),
        (Activation::Sigmoid, PI),
        (Activation::Softplus, PI),
    ] {
        for z in [-40.0, -3.0, 0.0, 0.7, 12.0] {
            let r = f64::hypot(z, c);
            for sign in [1.0, -1.0] {
                assert!(act.bends(z, z + sign * 0.501 * r, 0.5), "{act} at {z}");
                assert!(!act.bends(z, z + sign * 0.499 * r, 0.5), "{act} at {z}");
            }
        }
    }
}

// Activations without a singularity or whose breaks are kinks never bend; NaN never does.
#[test]
fn piecewise_and_entire_activations_never_bend() {
    for act in [
        Activation::Identity,
        Activation::Relu,
        Activation::LeakyRelu { slope: 0.1 },
        Activation::Elu { alpha: 1.0 },
    ] {
        assert!(!act.bends(0.0, 1e6, 0.5), "{act}");
    }
    for act in [
        Activation::Tanh,
        Activation::Sigmoid,
        Activation::Softplus,
        Activation::Gelu,
    ] {
        assert!(!act.bends(0.0, f64::NAN, 0.5), "{act}");
        assert!(!act.bends(f64::NAN, 0.0, 0.5), "{act}");
    }
}

// Gelu is tanh of √(2/π)(z + 0.044715z³) (Hendrycks & Gimpel, arXiv 1606.08415): its radius is
// tanh's, taken in that argument.
#[test]
fn gelu_bends_where_its_tanh_does() {
    let arg = |z: f64| 0.797_884_560_802_865_4 * (z + 0.044_715 * z * z * z);
    for z in [-2.0, 0.0, 1.5] {
        let r = f64::hypot(arg(z), PI / 2.0);
        // The z whose argument has moved by 0.6 and 0.4 of the radius (the argument grows with z).
        let solve = |target: f64| {
            let (mut lo, mut hi) = (z, z + 10.0);
            for _ in 0..200 {
                let mid = 0.5 * (lo + hi);
                if arg(mid) - arg(z) < target {
                    lo = mid
                } else {
                    hi = mid
                }
            }
            lo
        };
        assert!(Activation::Gelu.bends(z, solve(0.6 * r), 0.5));
        assert!(!Activation::Gelu.bends(z, solve(0.4 * r), 0.5));
    }
}

// A softmax output: log-sum-exp of two logits is singular where they differ by iπ, so a gap g
// may move by half of √(g² + π²) before the row bends; the largest logit's own value moving
// with the rest (a shift) moves no gap.
#[test]
fn a_softmax_row_bends_by_its_gaps() {
    let mut b = GraphBuilder::new(Shape::Flat(2), LossConfig::cross_entropy());
    b.push(None, Activation::Softmax, |s| Dense::new(2, s))
        .unwrap();
    let graph = b.finish().unwrap();
    // z = W·x + b with W the identity, b = 0: the logits are the inputs.
    let params = vec![
        ArrayD::from_shape_vec(IxDyn(&[2, 2]), vec![1.0, 0.0, 0.0, 1.0]).unwrap(),
        ArrayD::zeros(IxDyn(&[2])),
    ];
    let base = graph.forward(&params, array![[3.0, 0.0]].view());
    let r = f64::hypot(3.0, PI);
    for (moved, bent) in [
        ([3.0, 0.0 + 0.499 * r], false),
        ([3.0, 0.0 + 0.501 * r], true),
        ([3.0 - 0.501 * r, 0.0], true),
        ([3.0 + 0.499 * r, 0.0], false),
        ([1003.0, 1000.0], false),
    ] {
        let now = graph.forward(&params, array![moved].view());
        assert_eq!(graph.bent(&base, &now, 0.5), bent, "{moved:?}");
    }
}
