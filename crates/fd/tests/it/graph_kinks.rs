//! A max-pool window whose two largest values tie exactly: a step of one kernel entry moves them
//! apart on one side of the stencil and not the other, so the loss has no derivative there. The
//! check must call those coordinates `unreliable`, not a mismatch, while the bias (which moves
//! both equally, keeping the tie) stays a match. Constructed by hand: with kernel [1, 0.5] and
//! inputs 1, 2, 0 the first two outputs are 1 + 1 = 2 and 2 + 0 = 2.

use ndarray::{Array2, ArrayD, IxDyn, arr1};
use plumb_engine::Activation;
use plumb_engine::Rng;
use plumb_engine::graph::{
    Conv, ConvSettings, Dense, Flatten, GraphBuilder, LossConfig, Pool, PoolKind, Shape,
};
use plumb_fd::{CheckConfig, Method, Precision, Sample, Status, check_graph};

#[test]
fn a_max_pool_tie_is_unreliable_not_a_mismatch() {
    let mut b = GraphBuilder::new(
        Shape::Signal {
            channels: 1,
            length: 8,
        },
        LossConfig::cross_entropy(),
    );
    b.push(None, Activation::Relu, |s| {
        Conv::new(&ConvSettings::conv1d(1, 2), s)
    })
    .unwrap();
    b.push(None, Activation::Identity, |s| {
        Pool::new(PoolKind::Max, 1, [1, 2], [1, 2], s)
    })
    .unwrap();
    b.push(None, Activation::Identity, Flatten::new).unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(2, s))
        .unwrap();
    let g = b.finish().unwrap();
    let mut rng = Rng::new(5);
    let params = vec![
        arr1(&[1.0, 0.5])
            .into_shape_with_order(IxDyn(&[1, 1, 2]))
            .unwrap(),
        ArrayD::zeros(IxDyn(&[1])),
        ArrayD::from_shape_fn(IxDyn(&[2, 3]), |_| rng.normal()),
        ArrayD::from_shape_fn(IxDyn(&[2]), |_| 0.1 * rng.normal()),
    ];
    // Every sample starts 1, 2, 0: a tie at 2 in the first window; the rest positive and apart.
    let x = Array2::from_shape_fn((4, 8), |(i, t)| match t {
        0 => 1.0,
        1 => 2.0,
        2 => 0.0,
        _ => 1.0 + 0.37 * ((i * 8 + t) as f64),
    });
    let y = Array2::from_shape_fn((4, 2), |(i, k)| ((i + k) % 2) as f64);
    let base = g.branches(&g.forward(&params, x.view()));
    assert_eq!(base.layers[1].ties, 4, "one tie per sample");
    for (method, precision) in [
        (Method::Central, Precision::F64),
        (Method::Central, Precision::F32),
        (Method::FivePoint, Precision::F64),
        (Method::ComplexStep, Precision::F64),
        (Method::ComplexStep, Precision::F32),
    ] {
        let cfg = CheckConfig {
            sample: Some(Sample::All),
            ..CheckConfig::new(method, precision)
        };
        let r = check_graph(&g, &params, x.view(), y.view(), &cfg, &|_, _| {}).unwrap();
        let status = |t: usize, k: usize| {
            r.coords
                .iter()
                .find(|c| c.coord.tensor == t && c.coord.index == k)
                .unwrap()
                .status
        };
        let what = format!("{method} {}", precision.name());
        assert_eq!(status(0, 0), Status::Unreliable, "{what}: kernel entry 0");
        assert_eq!(status(0, 1), Status::Unreliable, "{what}: kernel entry 1");
        assert_eq!(
            status(1, 0),
            Status::Match,
            "{what}: the bias keeps the tie"
        );
        assert!(
            r.coords.iter().all(|c| c.status != Status::Mismatch)
                && r.directions.iter().all(|d| d.status != Status::Mismatch),
            "{what}"
        );
        // The dense layer above the pool is smooth: settled.
        assert!(
            r.coords
                .iter()
                .filter(|c| c.coord.tensor >= 2)
                .all(|c| c.status == Status::Match),
            "{what}"
        );
    }
}
