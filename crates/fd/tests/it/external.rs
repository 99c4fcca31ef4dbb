//! The check against a loss plumb can only ask for, with the engine playing the outside program.

use ndarray::ArrayD;
use plumb_engine::graph::Graph;
use plumb_engine::{Activation, Batch, Init, Loss, Rng};
use plumb_fd::{
    Change, ExternalConfig, Inside, Method, OutsideTensor, Sample, Status, check_external,
};

use crate::graph_common::dense;

fn setup() -> (Graph, Vec<ArrayD<f64>>, Batch) {
    let net = dense(
        4,
        &[
            (6, Activation::Tanh),
            (5, Activation::Sigmoid),
            (3, Activation::Softmax),
        ],
        Loss::CrossEntropy,
        0.1,
    );
    let w = Init::GlorotUniform.graph_params(&net, &mut Rng::new(2));
    let b = Batch::graph_synthetic(&net, 9, 2);
    (net, w, b)
}

/// `values` with each change of perturbation `p` applied.
fn moved<S: Copy + std::ops::AddAssign>(
    values: &[ArrayD<S>],
    changes: &[Change],
    p: usize,
    delta: impl Fn(f64) -> S,
) -> Vec<ArrayD<S>> {
    let mut out = values.to_vec();
    for c in changes.iter().filter(|c| c.perturbation as usize == p) {
        out[c.tensor as usize].as_slice_mut().unwrap()[c.index as usize] += delta(c.delta);
    }
    out
}

fn run(grad: &[ArrayD<f64>], method: Method) -> plumb_fd::ExternalResult {
    let (net, w, b) = setup();
    let tensors: Vec<OutsideTensor> = w
        .iter()
        .zip(grad)
        .enumerate()
        .map(|(i, (v, g))| OutsideTensor {
            name: format!("tensor{i}"),
            values: v.iter().copied().collect(),
            gradient: g.iter().copied().collect(),
            gross: Vec::new(),
        })
        .collect();
    let (x, y) = (b.x.view(), b.y.view());
    let f0 = net.loss(&w, x, y);
    // The outside loss: the engine on a perturbed copy, perturbation by perturbation.
    let mut losses = |count: usize, changes: &[Change]| -> Result<Vec<f64>, ()> {
        Ok((0..count)
            .map(|p| net.loss(&moved(&w, changes, p, |d| d), x, y))
            .collect())
    };
    let cfg = ExternalConfig {
        method,
        step: None,
        sample: Sample::All,
        directions: 2,
        seed: 1,
        eps: f64::EPSILON,
        tolerance: 1e-6,
    };
    check_external(&tensors, f0, &mut losses, &Inside::opaque(), &cfg).unwrap()
}

#[test]
fn a_right_gradient_passes_and_a_wrong_entry_is_found() {
    let (net, w, b) = setup();
    let g = net.gradient(&w, b.x.view(), b.y.view(), None).params;
    for method in [
        Method::Central,
        Method::FivePoint,
        Method::Richardson,
        Method::Forward,
    ] {
        let r = run(&g, method);
        assert_eq!(r.coords.len(), net.parameters());
        assert!(
            r.coords.iter().all(|c| c.status == Status::Match),
            "{method}"
        );
        assert!(
            r.directions.iter().all(|d| d.status == Status::Match),
            "{method}"
        );
    }
    // Layer 2's weight (tensor 2, 5 × 6), unit 2, input 3.
    let mut bad = g.clone();
    let target = 2 * 6 + 3;
    bad[2].as_slice_mut().unwrap()[target] *= 1.01;
    let r = run(&bad, Method::Central);
    let found: Vec<(usize, usize)> = r
        .coords
        .iter()
        .filter(|c| c.status == Status::Mismatch)
        .map(|c| (c.coord.tensor, c.coord.index))
        .collect();
    assert_eq!(found, vec![(2, target)]);
}

/// A ReLU network as a black box computing in f32 (the engine in single precision; nothing known of
/// its inside): `count` losses at perturbed parameters, as an outside program would answer.
fn relu_black_box(seed: u64, grad_error: Option<f64>) -> (plumb_fd::ExternalResult, usize) {
    let net = dense(
        4,
        &[
            (8, Activation::Relu),
            (6, Activation::Relu),
            (3, Activation::Softmax),
        ],
        Loss::CrossEntropy,
        0.01,
    );
    let w = Init::HeNormal.graph_params(&net, &mut Rng::new(seed));
    let b = Batch::graph_synthetic(&net, 32, seed);
    let (x, y) = b.cast::<f32>();
    let (x, y) = (x.view(), y.view());
    let w32: Vec<ArrayD<f32>> = w.iter().map(|t| t.mapv(|v| v as f32)).collect();
    let g = net.gradient(&w32, x, y, None).params;
    let mut g: Vec<ArrayD<f64>> = g.iter().map(|t| t.mapv(|v| v as f64)).collect();
    // The largest entry whose stencils (up to ±0.4) cross no kink, as the engine sees from inside,
    // made 1% larger when asked: an entry at a kink is `unreliable` from outside, rightly.
    let base = net.branches(&net.forward(&w32, x));
    let (mut at, mut big, mut place) = (0usize, 0.0f64, (0, 0));
    let mut flat = 0;
    for (t, gt) in g.iter().enumerate() {
        for (k, &v) in gt.iter().enumerate() {
            let kinked = [0.4f32, -0.4].iter().any(|&d| {
                let mut q = w32.clone();
                q[t].as_slice_mut().unwrap()[k] += d;
                !net.branches(&net.forward(&q, x)).changed(&base).is_empty()
            });
            if v.abs() > big && !kinked {
                (at, big, place) = (flat, v.abs(), (t, k));
            }
            flat += 1;
        }
    }
    if let Some(e) = grad_error {
        g[place.0].as_slice_mut().unwrap()[place.1] *= 1.0 + e;
    }
    let tensors: Vec<OutsideTensor> = w32
        .iter()
        .zip(&g)
        .enumerate()
        .map(|(i, (v, g))| OutsideTensor {
            name: format!("tensor{i}"),
            values: v.iter().map(|&x| x as f64).collect(),
            gradient: g.iter().copied().collect(),
            gross: Vec::new(),
        })
        .collect();
    let f0 = net.loss(&w32, x, y) as f64;
    let mut losses = |count: usize, changes: &[Change]| -> Result<Vec<f64>, ()> {
        Ok((0..count)
            .map(|p| net.loss(&moved(&w32, changes, p, |d| d as f32), x, y) as f64)
            .collect())
    };
    let cfg = ExternalConfig {
        method: Method::Central,
        step: None,
        sample: Sample::All,
        directions: 4,
        seed: 1,
        eps: f32::EPSILON as f64,
        tolerance: 1e-3,
    };
    let r = check_external(&tensors, f0, &mut losses, &Inside::opaque(), &cfg).unwrap();
    // The flat index of the planted entry, as (tensor, index) count in the result.
    (r, at)
}

/// Black box, f32, ReLU: the loss's kinks are invisible from outside, and stencils that cross them
/// once raised false mismatches on about 3.7% of coordinates. The second differences
/// f(±2h) and f(±4h) against f(±h) (four and sixteen times as large on a smooth loss) tell a kink
/// inside the stencil; such a coordinate is retried smaller or `unreliable`. Both directions over 20
/// seeds: no false mismatch on a right gradient, and a 1% error in the largest entry found there.
///
/// With the layer graph as the black box seed 11 once gave a false mismatch: a direction over
/// layer 2's bias (tensor 3), analytic −0.149786 against numeric −0.149418, relative error 2.5e-3
/// over the f32 tolerance 1e-3 with a bound of 2.1e-4. The gradient is right (f64 central
/// differences along that direction give −0.149786 at steps 1e-6 to 1e-4), and a ReLU unit
/// changes side at +0.004 along it, inside the f32 stencil, which the second differences over
/// the wider stencil took for smooth. The estimate at half the step contradicts the first beyond
/// both bounds: such a disagreement is now `unreliable`.
#[test]
fn black_box_relu_in_f32_raises_no_false_alarm_and_finds_one_percent() {
    let mut unsettled = 0;
    let mut total = 0;
    for seed in 0..20 {
        let (r, _) = relu_black_box(seed, None);
        let bad: Vec<_> = r
            .coords
            .iter()
            .filter(|c| c.status == Status::Mismatch)
            .collect();
        assert!(
            bad.is_empty(),
            "seed {seed}: {} false, first {:?}",
            bad.len(),
            bad[0]
        );
        assert!(
            r.directions.iter().all(|d| d.status != Status::Mismatch),
            "seed {seed}: {:?}",
            r.directions
        );
        unsettled += r.coords.iter().filter(|c| !c.status.settled()).count();
        total += r.coords.len();

        let (r, at) = relu_black_box(seed, Some(0.01));
        let found: Vec<usize> = r
            .coords
            .iter()
            .enumerate()
            .filter(|(_, c)| c.status == Status::Mismatch)
            .map(|(i, _)| i)
            .collect();
        assert_eq!(found, vec![at], "seed {seed}: {:?}", r.coords[at]);
    }
    eprintln!("unsettled or unreliable: {unsettled} of {total}");
}
