//! A batch a file stored in f32, read by the whole-batch gradient as f32 (`Inputs::F32`: the
//! first dense layer widens it a block of samples at a time), against the same batch widened to
//! f64 first, bit for bit: every f32 is exactly an f64, so the two are the same arithmetic on
//! the same values. The widened batch's gradient is the one graph_dual's tests hold to num-dual.

use ndarray::Array2;
use plumb_engine::graph::{Conv, ConvSettings, Dense, Flatten, Graph, GraphBuilder, LossConfig};
use plumb_engine::graph::{Padding, Shape};
use plumb_engine::{Activation, Inputs, Rng};

use crate::graph_common::{random_params, random_y};

/// A dense network over `sizes` (ReLU inside, softmax and cross-entropy with L2 at the top).
fn dense(sizes: &[usize]) -> Graph {
    let config = LossConfig {
        l2: 1e-4,
        ..LossConfig::cross_entropy()
    };
    let mut b = GraphBuilder::new(Shape::Flat(sizes[0]), config);
    for (i, &units) in sizes[1..].iter().enumerate() {
        let act = if i + 2 == sizes.len() {
            Activation::Softmax
        } else {
            Activation::Relu
        };
        b.push(None, act, |s| Dense::new(units, s)).unwrap();
    }
    b.finish().unwrap()
}

fn same_bits<'a>(
    a: impl IntoIterator<Item = &'a f64>,
    b: impl IntoIterator<Item = &'a f64>,
) -> bool {
    let (a, b): (Vec<u64>, Vec<u64>) = (
        a.into_iter().map(|v| v.to_bits()).collect(),
        b.into_iter().map(|v| v.to_bits()).collect(),
    );
    a == b
}

/// `Graph::gradient` and `parameter_gradient` on the f32 batch and on it widened: the same bits,
/// with no mistake and with the first layer's catalogued one planted.
fn f32_batch_matches_widened(g: &Graph, m: usize, seed: u64, what: &str) {
    let mut rng = Rng::new(seed);
    let params = random_params(g, &mut rng);
    let x32 = Array2::from_shape_fn((m, g.input().size()), |_| rng.normal() as f32);
    let x = x32.mapv(f64::from);
    let y = random_y(g, m, &mut rng);
    let first = &g.nodes()[0];
    let mut plants = vec![None];
    plants.extend(
        first
            .layer
            .mistakes()
            .iter()
            .map(|code| Some(g.plant(&first.name, code).unwrap())),
    );
    for planted in &plants {
        let narrow = g.gradient(&params, Inputs::F32(x32.view()), y.view(), planted.as_ref());
        let wide = g.gradient(&params, x.view(), y.view(), planted.as_ref());
        assert_eq!(
            narrow.loss.to_bits(),
            wide.loss.to_bits(),
            "{what}: the loss"
        );
        for (t, (a, b)) in narrow.params.iter().zip(&wide.params).enumerate() {
            assert!(same_bits(a, b), "{what}: tensor {t} differs");
        }
        assert!(
            same_bits(&narrow.input, &wide.input),
            "{what}: the input gradient"
        );
        let (loss, narrow) =
            g.parameter_gradient(&params, Inputs::F32(x32.view()), y.view(), planted.as_ref());
        assert_eq!(loss.to_bits(), wide.loss.to_bits(), "{what}: the loss");
        for (t, (a, b)) in narrow.iter().zip(&wide.params).enumerate() {
            assert!(
                same_bits(a, b),
                "{what}: tensor {t} differs (no input gradient)"
            );
        }
    }
}

// Blocks of samples: 8,192 (16 of 512), 1,500 (3 of 500) and 2,049 (5 of 410, the forward's
// last block of 513 rows); 1,000 samples are one block. 784 inputs and 256 units (the grad
// bench's network), and 100 inputs into 30 units.
#[test]
fn a_dense_first_layer_reads_f32_in_blocks_with_the_widened_bits() {
    let g = dense(&[784, 256, 128, 10]);
    for (m, seed) in [(8192, 1), (1500, 2), (2049, 3), (1000, 4)] {
        f32_batch_matches_widened(&g, m, seed, &format!("784-256-128-10, {m} samples"));
    }
    let g = dense(&[100, 30, 3]);
    f32_batch_matches_widened(&g, 3000, 5, "100-30-3, 3000 samples");
}

// Layers that do not read f32 (a small dense layer, a convolution) get the batch widened whole.
#[test]
fn other_first_layers_get_the_batch_widened() {
    let g = dense(&[20, 8, 3]);
    f32_batch_matches_widened(&g, 2048, 6, "20-8-3, 2048 samples");
    let input = Shape::Image {
        channels: 2,
        height: 6,
        width: 6,
    };
    let mut b = GraphBuilder::new(input, LossConfig::squared_error());
    let settings = ConvSettings {
        padding: Padding::Same,
        ..ConvSettings::conv2d(3, [3, 3])
    };
    b.push(None, Activation::Tanh, |s| Conv::new(&settings, s))
        .unwrap();
    b.push(None, Activation::Identity, Flatten::new).unwrap();
    b.push(None, Activation::Identity, |s| Dense::new(2, s))
        .unwrap();
    f32_batch_matches_widened(&b.finish().unwrap(), 1100, 7, "conv first, 1100 samples");
}
