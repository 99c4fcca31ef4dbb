//! Real data: the Iris measurements (Fisher, Annals of Eugenics 7:179–188, 1936), as the UCI
//! repository distributes them (fixtures/data/iris.csv), standardised, through a 4-8-3
//! tanh/softmax network with L2. The engine's gradient must match num-dual's on all 150 samples.

use crate::common;

use common::{dense, dual_gradient, max_relative};
use ndarray::Array2;
use plumb_engine::{Activation, Batch, Init, Loss, Rng};

/// fixtures/data/iris.csv (its provenance is in fixtures/data/README.md): four measurements, then
/// the species 0–2.
fn iris() -> Batch {
    let text = include_str!("../../../../fixtures/data/iris.csv");
    let mut records = Vec::new();
    let mut labels = Vec::new();
    for line in text.lines().skip(1) {
        let fields: Vec<f64> = line.split(',').map(|f| f.parse().unwrap()).collect();
        records.extend_from_slice(&fields[..4]);
        labels.push(fields[4] as usize);
    }
    let m = labels.len();
    let mut x = Array2::from_shape_vec((m, 4), records).unwrap();
    for mut col in x.columns_mut() {
        let mean = col.mean().unwrap();
        let sd = col.std(0.0);
        col.mapv_inplace(|v| (v - mean) / sd);
    }
    let mut y = Array2::zeros((m, 3));
    for (i, &c) in labels.iter().enumerate() {
        y[[i, c]] = 1.0;
    }
    Batch { x, y }
}

/// The file against the UCI repository's summary statistics (column means to two decimals: 5.84,
/// 3.05, 3.76, 1.20 cm; quoted from memory, and the reason the second check below exists).
#[test]
fn iris_file_has_the_published_means() {
    let text = include_str!("../../../../fixtures/data/iris.csv");
    let mut sums = [0.0; 4];
    for line in text.lines().skip(1) {
        for (s, f) in sums.iter_mut().zip(line.split(',')) {
            *s += f.parse::<f64>().unwrap();
        }
    }
    let means = sums.map(|s| (s / 150.0 * 100.0).round() / 100.0);
    assert_eq!(means, [5.84, 3.05, 3.76, 1.2]);
}

#[test]
fn iris_has_the_published_size() {
    // Fisher 1936: 150 flowers, 4 measurements, 3 species of 50 each.
    let b = iris();
    assert_eq!(b.x.dim(), (150, 4));
    assert_eq!(
        b.y.sum_axis(ndarray::Axis(0)).to_vec(),
        vec![50.0, 50.0, 50.0]
    );
}

#[test]
fn gradient_matches_num_dual_on_iris() {
    let net = dense(
        4,
        &[(8, Activation::Tanh), (3, Activation::Softmax)],
        Loss::CrossEntropy,
        0.05,
    );
    let batch = iris();
    for seed in [1, 2, 3] {
        let w = Init::GlorotUniform.graph_params(&net, &mut Rng::new(seed));
        let g = net.gradient(&w, batch.x.view(), batch.y.view(), None);
        let (loss, grad) = (g.loss, g.params);
        let (dual_loss, dual_grad) = dual_gradient(&net, &w, &batch.x, &batch.y);
        assert!((loss - dual_loss).abs() <= 1e-12 * dual_loss);
        let err = max_relative(&grad, &dual_grad, 1e-9);
        assert!(err <= 1e-12, "seed {seed}: {err:e}");
        // Untrained three-class network: the loss is near ln 3 (an untrained net is close to uniform).
        assert!((loss - 3f64.ln()).abs() < 0.6, "{loss}");
    }
}
