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
        .map(|c| (c.tensor, c.index))
        .collect();
    assert_eq!(found, vec![(1, target.1 * 7 + target.2)]); // layer 2 is 5 × (6 + 1)
}
