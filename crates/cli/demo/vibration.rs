//! The demo's scenario (b): the invented pump's state told from a window of raw vibration samples
//! by a small 1-D convolutional network with batch normalisation and a residual block (the
//! network of examples/pump-cnn.toml, which examples/python/cnn_numpy.py writes by hand).
//!
//! The windows are invented and generated from the seed: a sinusoid at the running speed for
//! every state, broadband noise bursts on top for cavitation, a higher harmonic for bearing wear.
//! They are plausible in kind only; no pump was measured.

use ndarray::Array2;
use plumb_engine::{Batch, Rng};

use super::layered::{Bug, Scenario};
use super::pump::STATES;

/// The description: the example's own file, so that the hand-written NumPy CNN fits it.
pub const DESCRIPTION: &str = include_str!("../../../examples/pump-cnn.toml");

/// Samples per window, and windows per state.
const LENGTH: usize = 64;
const PER_STATE: usize = 20;

/// The running speed, in cycles per window (about four), and the bearing harmonic's multiple of it.
const CYCLES: f64 = 4.0;
const BEARING_HARMONIC: f64 = 5.3;

/// The "hand-written" implementation's conv bugs, one picked by the seed: (code, layer, what it
/// does).
const BUGS: [Bug; 4] = [
    Bug {
        code: "kernel-flipped",
        layer: "conv2",
        label: "conv2's gradients use its kernel turned end for end",
    },
    Bug {
        code: "channels-swapped",
        layer: "conv2",
        label: "conv2's weight gradient has its input and output channels exchanged",
    },
    Bug {
        code: "padding-offset",
        layer: "conv3",
        label: "conv3's input gradient is cut from the padded buffer at offset 0, not at the padding",
    },
    Bug {
        code: "overlap-overwritten",
        layer: "conv3",
        label: "conv3's input gradient assigns each window's share where windows overlap, instead of adding",
    },
];

/// The invented windows (m × 64, one channel) and their one-hot states, drawn from `seed`.
pub fn batch(seed: u64) -> Batch {
    let mut rng = Rng::new(seed ^ 0x9a3b_0002);
    let m = PER_STATE * STATES.len();
    let mut x = Array2::zeros((m, LENGTH));
    let mut y = Array2::zeros((m, STATES.len()));
    let tau = std::f64::consts::TAU;
    for (i, mut row) in x.rows_mut().into_iter().enumerate() {
        let state = i % STATES.len();
        y[[i, state]] = 1.0;
        let amplitude = 1.0 + 0.1 * rng.normal();
        let speed = CYCLES * (1.0 + 0.05 * rng.normal()) / LENGTH as f64;
        let phase = rng.range(0.0, tau);
        let harmonic_phase = rng.range(0.0, tau);
        let harmonic = rng.range(0.4, 0.6);
        // Cavitation: two to four bursts of broadband noise, six samples each.
        let mut burst = vec![0.0; LENGTH];
        if state == 1 {
            for _ in 0..2 + rng.below(3) {
                let at = rng.below(LENGTH - 6);
                let size = rng.range(0.6, 1.0);
                for b in &mut burst[at..at + 6] {
                    *b += size * rng.normal();
                }
            }
        }
        for (t, v) in row.iter_mut().enumerate() {
            let t = t as f64;
            *v = amplitude * (tau * speed * t + phase).sin() + 0.1 * rng.normal();
            if state == 2 {
                *v += harmonic * (tau * BEARING_HARMONIC * speed * t + harmonic_phase).sin();
            }
        }
        for (v, b) in row.iter_mut().zip(&burst) {
            *v += b;
        }
    }
    // One scale for every window: unit root-mean-square over the whole batch.
    let rms = (x.iter().map(|v| v * v).sum::<f64>() / x.len() as f64).sqrt();
    x.mapv_inplace(|v| v / rms);
    Batch { x, y }
}

/// Scenario (b) for `seed`.
pub fn scenario(seed: u64) -> Scenario {
    Scenario {
        stem: "pump-cnn",
        description: DESCRIPTION,
        batch: batch(seed),
        bug: BUGS[(seed % BUGS.len() as u64) as usize],
        seed: seed ^ 0x9a3b_0012,
        steps: 150,
        rate: 0.2,
        example: "examples/python/cnn_numpy.py",
        plant: |b| format!("{}:{}", b.code, b.layer),
    }
}
