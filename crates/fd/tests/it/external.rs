//! The check against a loss plumb can only ask for, with the engine playing the outside program.

use plumb_engine::{Activation, Batch, Init, Loss, Network, Rng, Weights};
use plumb_fd::{
    Change, ExternalConfig, Inside, Method, OutsideTensor, Sample, Status, check_external,
};

fn setup() -> (Network, Weights<f64>, Batch) {
    let net = Network::new(
        4,
        &[
            (6, Activation::Tanh),
            (5, Activation::Sigmoid),
            (3, Activation::Softmax),
        ],
        Loss::CrossEntropy,
        0.1,
    )
    .unwrap();
    let w = Init::GlorotUniform.weights(&net, &mut Rng::new(2));
    let b = Batch::synthetic(&net, 9, 2);
    (net, w, b)
}

fn run(grad: &Weights<f64>, method: Method) -> plumb_fd::ExternalResult {
    let (net, w, b) = setup();
    let tensors: Vec<OutsideTensor> = w
        .layers()
        .iter()
        .zip(grad.layers())
        .enumerate()
        .map(|(i, (v, g))| OutsideTensor {
            name: format!("layer{}", i + 1),
            values: v.iter().copied().collect(),
            gradient: g.iter().copied().collect(),
            gross: Vec::new(),
        })
        .collect();
    let f0 = net.loss_value(&w, b.x.view(), b.y.view());
    // The outside loss: the engine on a perturbed copy, perturbation by perturbation.
    let mut losses = |count: usize, changes: &[Change]| -> Result<Vec<f64>, ()> {
        let mut out = Vec::with_capacity(count);
        for p in 0..count {
            let mut moved = w.clone();
            for c in changes.iter().filter(|c| c.perturbation as usize == p) {
                let cols = moved.layer(c.tensor as usize).ncols();
                let (r, col) = (c.index as usize / cols, c.index as usize % cols);
                moved.layers_mut()[c.tensor as usize][[r, col]] += c.delta;
            }
            out.push(net.loss_value(&moved, b.x.view(), b.y.view()));
        }
        Ok(out)
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
    let (_, g) = net.gradient(&w, b.x.view(), b.y.view());
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
    let mut bad = g.clone();
    let target = (1, 2, 3);
    bad.layers_mut()[target.0][[target.1, target.2]] *= 1.01;
    let r = run(&bad, Method::Central);
    let found: Vec<(usize, usize)> = r
        .coords
        .iter()
        .filter(|c| c.status == Status::Mismatch)
        .map(|c| (c.coord.tensor, c.coord.index))
        .collect();
    assert_eq!(found, vec![(1, target.1 * 7 + target.2)]); // layer 2 is 5 × (6 + 1)
}

/// A ReLU network as a black box computing in f32 (the engine in single precision; nothing known of
/// its inside): `count` losses at perturbed parameters, as an outside program would answer.
fn relu_black_box(seed: u64, grad_error: Option<f64>) -> (plumb_fd::ExternalResult, usize) {
    let net = Network::new(
        4,
        &[
            (8, Activation::Relu),
            (6, Activation::Relu),
            (3, Activation::Softmax),
        ],
        Loss::CrossEntropy,
        0.01,
    )
    .unwrap();
    let w = Init::HeNormal.weights(&net, &mut Rng::new(seed));
    let b = Batch::synthetic(&net, 32, seed);
    let (x, y) = b.cast::<f32>();
    let w32: Weights<f32> = w.cast();
    let (_, g) = net.gradient(&w32, x.view(), y.view());
    let mut g: Weights<f64> = g.map(|&v| v as f64);
    // The largest entry whose stencils (up to ±0.4) cross no kink, as the engine sees from inside,
    // made 1% larger when asked: an entry at a kink is `unreliable` from outside, rightly.
    let inside = plumb_fd::Base::new(&net, &w32, x.view(), &y);
    let (mut at, mut big) = (0usize, 0.0f64);
    for flat in 0..g.parameters() {
        let c = g.coord(flat).unwrap();
        let v = *g.get(c);
        let kinked = [0.4f32, -0.4].iter().any(|&d| inside.perturbed(c, d).1);
        if v.abs() > big && !kinked {
            (at, big) = (flat, v.abs());
        }
    }
    if let Some(e) = grad_error {
        let c = g.coord(at).unwrap();
        *g.get_mut(c) *= 1.0 + e;
    }
    let tensors: Vec<OutsideTensor> = w32
        .layers()
        .iter()
        .zip(g.layers())
        .enumerate()
        .map(|(i, (v, g))| OutsideTensor {
            name: format!("layer{}", i + 1),
            values: v.iter().map(|&x| x as f64).collect(),
            gradient: g.iter().copied().collect(),
            gross: Vec::new(),
        })
        .collect();
    let f0 = net.loss_value(&w32, x.view(), y.view()) as f64;
    let mut losses = |count: usize, changes: &[Change]| -> Result<Vec<f64>, ()> {
        let mut out = Vec::with_capacity(count);
        for p in 0..count {
            let mut moved = w32.clone();
            for c in changes.iter().filter(|c| c.perturbation as usize == p) {
                let cols = moved.layer(c.tensor as usize).ncols();
                let (r, col) = (c.index as usize / cols, c.index as usize % cols);
                moved.layers_mut()[c.tensor as usize][[r, col]] += c.delta as f32;
            }
            out.push(net.loss_value(&moved, x.view(), y.view()) as f64);
        }
        Ok(out)
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
