//! The dense engine's side of `graph dense` (the figure before the graph took over every check):
//! it goes, with this file and that section, when the dense engine is deleted.

use ndarray::ArrayD;
use plumb_engine::graph::Dense;
use plumb_engine::{Activation, Batch, Init, Loss, Network, Rng, Weights};
use plumb_fd::{CheckConfig, CheckResult, check};

/// The tanh network of [`super::network`] on the dense engine: the same weights and batch.
pub fn network() -> (Network, Weights<f64>, Batch) {
    let net = Network::new(
        784,
        &[
            (128, Activation::Tanh),
            (64, Activation::Tanh),
            (10, Activation::Softmax),
        ],
        Loss::CrossEntropy,
        1e-4,
    )
    .unwrap();
    let w = Init::GlorotUniform.weights(&net, &mut Rng::new(1));
    let batch = Batch::synthetic(&net, 32, 1);
    (net, w, batch)
}

/// The dense engine's weights as the graph's tensors (each augmented matrix split).
pub fn tensors(w: &Weights<f64>) -> Vec<ArrayD<f64>> {
    w.layers()
        .iter()
        .flat_map(|a| {
            let (wt, bias) = Dense::split(a);
            [wt.into_dyn(), bias.into_dyn()]
        })
        .collect()
}

/// The dense engine's check.
pub fn run(net: &Network, w: &Weights<f64>, batch: &Batch, cfg: &CheckConfig) -> CheckResult {
    check(net, w, batch, cfg, &|_, _| {}).unwrap()
}
