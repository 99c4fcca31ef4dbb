//! Batch, layer and RMS norms on flat, signal, image and sequence inputs.

use plumb_engine::Rng;
use plumb_engine::graph::{BatchNorm, GraphBuilder, LayerNorm, RmsNorm, Shape};

use super::{ACTIVATIONS, conventions, finish_and_check, pick};

#[test]
fn norms_over_flat_signal_image_and_sequence_inputs() {
    let inputs = [
        Shape::Flat(5),
        Shape::Signal {
            channels: 3,
            length: 6,
        },
        // Three channels, not two: a norm over two features outputs ±1 whatever x is (up to ε), and
        // its input gradient is all cancellation.
        Shape::Image {
            channels: 3,
            height: 3,
            width: 4,
        },
        Shape::Sequence { steps: 3, width: 4 },
    ];
    for seed in 0..36u64 {
        let mut rng = Rng::new(200 + seed);
        let input = inputs[(seed % 4) as usize];
        let (config, out) = conventions(&mut rng);
        let mut b = GraphBuilder::new(input, config);
        let act = pick(&mut rng, &ACTIVATIONS);
        let eps = pick(&mut rng, &[1e-5, 1e-3, 0.1]);
        match (seed / 4) % 3 {
            0 => b.push(None, act, |s| BatchNorm::new(eps, s)),
            1 => b.push(None, act, |s| LayerNorm::new(eps, s)),
            _ => b.push(None, act, |s| RmsNorm::new(eps, s)),
        }
        .unwrap();
        finish_and_check(b, out, seed, &format!("norm {} on {input}", (seed / 4) % 3));
    }
}
