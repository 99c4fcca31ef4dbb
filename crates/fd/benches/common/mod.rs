//! What the fd benches share: the 784-128-64-10 tanh network they time, and the fingerprint of a
//! check's results that a run before and after a change compares. Each bench uses part of it.
#![allow(dead_code)]

use plumb_engine::{Activation, Batch, Init, Loss, Network, Rng, Weights};
use plumb_fd::Status;

/// A 784-128-64-10 tanh network (softmax output, cross-entropy, L2 1e-4), Glorot-uniform weights
/// (seed 1) and a synthetic batch of 32 (seed 1): 109,386 parameters.
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

/// The FNV-1a hash of the loss and every estimate's bits (numeric, then analytic), and the count
/// of each verdict: `results 0123…; N match, N unsettled, N unreliable, N mismatch`.
pub fn fingerprint(loss: f64, estimates: impl Iterator<Item = (f64, f64, Status)>) -> String {
    let mut hash: u64 = 0xcbf2_9ce4_8422_2325;
    let mut eat = |x: f64| {
        for byte in x.to_bits().to_le_bytes() {
            hash = (hash ^ u64::from(byte)).wrapping_mul(0x0000_0100_0000_01b3);
        }
    };
    eat(loss);
    let mut counts = [0usize; 4];
    for (numeric, analytic, status) in estimates {
        eat(numeric);
        eat(analytic);
        counts[status as usize] += 1;
    }
    let counts: Vec<String> = [
        Status::Match,
        Status::Unsettled,
        Status::Unreliable,
        Status::Mismatch,
    ]
    .iter()
    .map(|s| format!("{} {}", counts[*s as usize], s.name()))
    .collect();
    format!("results {hash:016x}; {}", counts.join(", "))
}
