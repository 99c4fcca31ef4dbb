//! Max and average pools, 1-D and 2-D, and the global average pool: random sizes and strides,
//! and the borders named one by one.

use plumb_engine::graph::{Conv, GlobalAvgPool, GraphBuilder, LossConfig, Pool, PoolKind, Shape};
use plumb_engine::{Activation, Rng};

use super::{ACTIVATIONS, conv_settings, conventions, finish_and_check, pick};

#[test]
fn pools_over_random_sizes_and_strides() {
    for seed in 0..40u64 {
        let mut rng = Rng::new(100 + seed);
        let dims = 1 + (seed % 2) as usize;
        let op = if seed % 4 < 2 {
            PoolKind::Max
        } else {
            PoolKind::Avg
        };
        let input = if dims == 1 {
            Shape::Signal {
                channels: 2,
                length: 9 + rng.below(5),
            }
        } else {
            Shape::Image {
                channels: 2,
                height: 5 + rng.below(3),
                width: 5 + rng.below(3),
            }
        };
        let (config, out) = conventions(&mut rng);
        let mut b = GraphBuilder::new(input, config);
        let s = conv_settings(&mut rng, dims, true);
        let act = pick(&mut rng, &ACTIVATIONS);
        b.push(None, act, |sh| Conv::new(&s, sh)).unwrap();
        let size = [1 + rng.below(2), 1 + rng.below(3)];
        let stride = if rng.below(2) == 0 {
            size
        } else {
            [1 + rng.below(2), 1 + rng.below(2)]
        };
        b.push(None, Activation::Identity, |sh| {
            Pool::new(op, dims, size, stride, sh)
        })
        .unwrap();
        if rng.below(2) == 0 {
            b.push(None, Activation::Identity, GlobalAvgPool::new)
                .unwrap();
        }
        finish_and_check(b, out, seed, &format!("{op:?} pool {dims}d"));
    }
}

/// The borders named one by one (the random tests reach them only by chance): pools whose ragged
/// tail is dropped, whose stride skips positions, or whose windows overlap.
#[test]
fn pool_borders() {
    let pools = [
        ("ragged tail", [2, 3], [2, 3]),
        ("stride > size", [1, 2], [3, 3]),
        ("overlapping", [3, 3], [2, 1]),
    ];
    let inputs = [
        (
            2,
            Shape::Image {
                channels: 2,
                height: 7,
                width: 8,
            },
        ),
        (
            1,
            Shape::Signal {
                channels: 2,
                length: 11,
            },
        ),
    ];
    for (seed, (what, size, stride)) in pools.into_iter().enumerate() {
        for op in [PoolKind::Max, PoolKind::Avg] {
            for (dims, input) in inputs {
                let mut b = GraphBuilder::new(input, LossConfig::cross_entropy());
                b.push(None, Activation::Identity, |sh| {
                    Pool::new(op, dims, size, stride, sh)
                })
                .unwrap();
                finish_and_check(b, Activation::Softmax, 10 + seed as u64, what);
            }
        }
    }
}
