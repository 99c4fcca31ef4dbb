//! Dense layers per step on sequences, and the dense incremental hint (one unit recomputed).

use plumb_engine::graph::{
    Add, Dense, Flatten, GraphBuilder, LayerNorm, LossConfig, Reduction, Shape,
};
use plumb_engine::{Activation, Rng};

use super::hints::hints_agree_both;
use super::{ACTIVATIONS, check, conventions, pick, push_output};

#[test]
fn dense_per_step_on_sequences_with_a_softmax_per_step() {
    for (seed, reduction) in [(1u64, Reduction::Mean), (2, Reduction::Sum)] {
        let config = LossConfig {
            reduction,
            ..LossConfig::cross_entropy()
        };
        let mut b = GraphBuilder::new(Shape::Sequence { steps: 4, width: 3 }, config);
        b.push(None, Activation::Tanh, |s| Dense::new(5, s))
            .unwrap();
        b.push(None, Activation::Softmax, |s| Dense::new(3, s))
            .unwrap();
        let g = b.finish().unwrap();
        assert_eq!(g.output(), Shape::Sequence { steps: 4, width: 3 });
        check(&g, seed, "sequence");
    }
}

/// Dense layers on flat inputs and per step on sequences (the hint's rows are samples × steps),
/// with a layer norm (no hint) and a residual add.
#[test]
fn incremental_hints_agree_with_the_full_pass_on_dense_layers() {
    for seed in 0..16u64 {
        let mut rng = Rng::new(950 + seed);
        let input = if seed % 2 == 0 {
            Shape::Flat(2 + rng.below(5))
        } else {
            Shape::Sequence {
                steps: 2 + rng.below(3),
                width: 2 + rng.below(3),
            }
        };
        let (config, out) = conventions(&mut rng);
        let mut b = GraphBuilder::new(input, config);
        let width = 2 + rng.below(4);
        let act = pick(&mut rng, &ACTIVATIONS);
        b.push(Some("first"), act, |sh| Dense::new(width, sh))
            .unwrap();
        b.push(None, Activation::Identity, |sh| LayerNorm::new(1e-5, sh))
            .unwrap();
        let act = pick(&mut rng, &ACTIVATIONS);
        b.push(None, act, |sh| Dense::new(width, sh)).unwrap();
        b.push(None, Activation::Identity, |sh| Add::new("first", sh))
            .unwrap();
        b.push(None, Activation::Identity, Flatten::new).unwrap();
        push_output(&mut b, out);
        let g = b.finish().unwrap();
        hints_agree_both(&g, seed, &format!("seed {seed} dense on {input}"));
    }
}
