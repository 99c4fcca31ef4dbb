//! `add`: residual blocks of convolutions and norms.

use plumb_engine::graph::{
    Add, BatchNorm, Conv, ConvSettings, GlobalAvgPool, GraphBuilder, LayerNorm, Padding, RmsNorm,
    Shape,
};
use plumb_engine::{Activation, Rng};

use super::{ACTIVATIONS, conventions, finish_and_check, pick};

#[test]
fn residual_blocks_with_convolutions_and_norms() {
    for seed in 0..20u64 {
        let mut rng = Rng::new(300 + seed);
        let input = Shape::Signal {
            channels: 2,
            length: 7 + rng.below(4),
        };
        let (config, out) = conventions(&mut rng);
        let mut b = GraphBuilder::new(input, config);
        let mut s = ConvSettings::conv1d(3, 3);
        s.padding = Padding::Same;
        b.push(Some("stem"), Activation::Relu, |sh| Conv::new(&s, sh))
            .unwrap();
        b.push(None, Activation::Identity, |sh| BatchNorm::new(1e-5, sh))
            .unwrap();
        let mut s2 = ConvSettings::conv1d(3, 2 + rng.below(3));
        s2.padding = Padding::Same;
        s2.dilation = [1, 1 + rng.below(2)];
        let act = pick(&mut rng, &ACTIVATIONS);
        b.push(None, act, |sh| Conv::new(&s2, sh)).unwrap();
        b.push(None, Activation::Identity, |sh| LayerNorm::new(1e-5, sh))
            .unwrap();
        b.push(None, pick(&mut rng, &ACTIVATIONS), |sh| {
            Add::new("stem", sh)
        })
        .unwrap();
        b.push(None, Activation::Identity, |sh| RmsNorm::new(1e-6, sh))
            .unwrap();
        b.push(None, Activation::Identity, GlobalAvgPool::new)
            .unwrap();
        finish_and_check(b, out, seed, "residual block");
    }
}
