//! Conv weights stored in another order than the canonical one: gradients map like values, and
//! the incremental hint follows the permutation.

use ndarray::ArrayD;
use num_dual::Dual64;
use plumb_engine::Activation;
use plumb_engine::Rng;
use plumb_engine::graph::{
    Conv, Dense, Flatten, Graph, GraphBuilder, LossConfig, Moved, Shape, Storage,
};

use super::{FLOOR, TOL, conv_settings};
use crate::graph_common::{self, random_params, random_x, random_y};

/// A conv (random settings, its weight stored in `order`) and a dense output, on a signal
/// (`dims` 1) or an image (2); with the storage of its weight.
fn stored_conv_net(rng: &mut Rng, dims: usize, order: &str) -> (Graph, Storage) {
    let (input, canonical) = if dims == 1 {
        (
            Shape::Signal {
                channels: 2,
                length: 9,
            },
            "oik",
        )
    } else {
        (
            Shape::Image {
                channels: 2,
                height: 5,
                width: 6,
            },
            "oihw",
        )
    };
    let storage = Storage::parse(order, canonical).unwrap();
    let mut b = GraphBuilder::new(input, LossConfig::squared_error());
    let s = conv_settings(rng, dims, false);
    b.push(None, Activation::Tanh, |sh| Conv::new(&s, sh))
        .unwrap();
    b.push(None, Activation::Identity, Flatten::new).unwrap();
    b.push(None, Activation::Identity, |sh| Dense::new(2, sh))
        .unwrap();
    (b.finish().unwrap(), storage)
}

/// The gradient of a tensor stored in another order is the canonical gradient in that order:
/// num-dual differentiates through the permutation of the file's tensor into the canonical one.
#[test]
fn storage_orders_map_gradients_like_values() {
    for (seed, dims, order) in [
        (1u64, 2, "hwio"),
        (2, 2, "ohwi"),
        (3, 2, "iohw"),
        (4, 1, "kio"),
        (5, 1, "oki"),
    ] {
        let mut rng = Rng::new(400 + seed);
        let (g, storage) = stored_conv_net(&mut rng, dims, order);
        let params = random_params(&g, &mut rng);
        let x = random_x(&g, 3, &mut rng);
        let y = random_y(&g, 3, &mut rng);
        let grad = g.gradient(&params, x.view(), y.view(), None);
        let file_grad = storage.to_file(&grad.params[0]);
        // num-dual: perturb the file-order tensor, permute it to canonical, evaluate.
        let file = storage.to_file(&params[0]);
        let pd: Vec<ArrayD<Dual64>> = params.iter().map(|p| p.mapv(Dual64::from_re)).collect();
        let (xd, yd) = (x.mapv(Dual64::from_re), y.mapv(Dual64::from_re));
        let mut dual = file.mapv(|_| 0.0);
        for k in 0..file.len() {
            let mut fd = file.mapv(Dual64::from_re);
            fd.as_slice_mut().unwrap()[k].eps = 1.0;
            let mut q = pd.clone();
            q[0] = storage.to_canonical(&fd);
            dual.as_slice_mut().unwrap()[k] = g.loss(&q, xd.view(), yd.view()).eps;
        }
        assert_eq!(file_grad.shape(), dual.shape());
        let err = graph_common::max_relative(file_grad.iter(), dual.iter(), FLOOR);
        assert!(err <= TOL, "{order}: {err:e}");
    }
}

/// A conv weight stored in another order: the file's entry k is the canonical entry the
/// permutation sends it to, and moving it through the hint gives the full pass's loss at the
/// file tensor moved and read back in canonical order.
#[test]
fn incremental_hints_follow_storage_orders() {
    for (seed, dims, order) in [
        (1u64, 2, "hwio"),
        (2, 2, "ohwi"),
        (3, 1, "kio"),
        (4, 1, "oki"),
    ] {
        let mut rng = Rng::new(990 + seed);
        let (g, storage) = stored_conv_net(&mut rng, dims, order);
        let params = random_params(&g, &mut rng);
        let x = random_x(&g, 3, &mut rng);
        let y = random_y(&g, 3, &mut rng);
        let base = g.forward(&params, x.view());
        let file = storage.to_file(&params[0]);
        // Where each file entry lands in canonical order.
        let positions = storage.to_canonical(
            &ArrayD::from_shape_vec(file.raw_dim(), (0..file.len()).collect()).unwrap(),
        );
        for k in 0..file.len() {
            let canonical_k = positions.iter().position(|&f| f == k).unwrap();
            let mut moved_file = file.clone();
            moved_file.as_slice_mut().unwrap()[k] += 0.25;
            let mut q = params.clone();
            q[0] = storage.to_canonical(&moved_file);
            let lf = g.loss(&q, x.view(), y.view());
            let moved = Moved {
                tensor: 0,
                index: canonical_k,
                delta: 0.25,
            };
            let tail = g.forward_moved(&params, x.view(), &base, &moved);
            let li = g.loss_moved(&params, &tail, y.view(), g.l2_sum(&params), &moved);
            let n = g.tensors()[0].spec.fan_in as f64;
            let tol = 64.0 * (n + 1.0) * f64::EPSILON * lf.abs().max(1.0);
            assert!(
                (li - lf).abs() <= tol,
                "{order} file entry {k}: {li} vs {lf}"
            );
        }
    }
}
