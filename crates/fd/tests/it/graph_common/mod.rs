//! Networks of every kind of the layer graph, with seeded values, for the graph check's tests.
//! The values are random draws (no outside source is needed: the engine's gradients are checked
//! against num-dual in crates/engine/tests; here the finite differences are the outside figure).

#![allow(dead_code)]

use std::path::{Path, PathBuf};

use ndarray::{Array2, ArrayD, IxDyn};
use plumb_engine::graph::{
    Add, Attention, BatchNorm, Conv, ConvSettings, Dense, Embedding, Flatten, GlobalAvgPool, Graph,
    GraphBuilder, Gru, LayerNorm, LossConfig, Lstm, Padding, Pool, PoolKind, RmsNorm, Rnn, Role,
    Shape,
};
use plumb_engine::{Activation, Batch, Init, Loss, Rng};
use plumb_fd::report::{GraphInputs, GraphLoaded};
use plumb_fd::{
    CheckConfig, GraphCheck, Method, Precision, Status, check_graph, check_graph_gradient,
};
use plumb_formats::GraphDescription;

/// One test case: a graph, parameters and a batch.
pub struct Case {
    pub graph: Graph,
    pub params: Vec<ArrayD<f64>>,
    pub x: Array2<f64>,
    pub y: Array2<f64>,
}

impl Case {
    /// The engine's own gradient at the case, in f64: the truth a check is held to (the engine
    /// is checked against num-dual's exact derivatives in crates/engine/tests/it/graph_dual).
    pub fn gradient(&self) -> Vec<ArrayD<f64>> {
        let (x, y) = (self.x.view(), self.y.view());
        self.graph.gradient(&self.params, x, y, None).params
    }
}

/// A named network builder.
pub type Build = (&'static str, fn() -> Graph);

/// The kinds covered, each by a small network that has it (name, builder).
pub fn kinds() -> Vec<Build> {
    vec![
        ("conv1d", conv1d),
        ("conv2d", conv2d),
        ("pools", pools),
        ("batch-norm", batch_norm),
        ("layer-norm + rms-norm", norms),
        ("add", residual),
        ("embedding + gru", embedding),
        ("rnn", rnn),
        ("lstm", lstm),
        ("attention", attention),
    ]
}

/// conv1d, stride 2, padding 1, dilation 2, tanh; a bias-free conv1d "same" with an even kernel;
/// flatten, dense softmax.
pub fn conv1d() -> Graph {
    let mut b = GraphBuilder::new(
        Shape::Signal {
            channels: 2,
            length: 11,
        },
        LossConfig {
            l2: 0.05,
            ..LossConfig::cross_entropy()
        },
    );
    let c1 = ConvSettings {
        stride: [1, 2],
        dilation: [1, 2],
        padding: Padding::Explicit([0, 1]),
        ..ConvSettings::conv1d(3, 3)
    };
    let c2 = ConvSettings {
        padding: Padding::Same,
        bias: false,
        ..ConvSettings::conv1d(2, 2)
    };
    b.push(None, Activation::Tanh, |s| Conv::new(&c1, s))
        .unwrap();
    b.push(None, Activation::Sigmoid, |s| Conv::new(&c2, s))
        .unwrap();
    b.push(None, Activation::Identity, Flatten::new).unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(3, s))
        .unwrap();
    b.finish().unwrap()
}

/// conv2d with a rectangular kernel, stride [1, 2], padding [1, 0], dilation [2, 1], elu; conv2d
/// "same"; global-avg-pool; dense; squared error, sum reduction.
pub fn conv2d() -> Graph {
    let mut b = GraphBuilder::new(
        Shape::Image {
            channels: 2,
            height: 6,
            width: 7,
        },
        LossConfig {
            reduction: plumb_engine::graph::Reduction::Sum,
            ..LossConfig::squared_error()
        },
    );
    let c1 = ConvSettings {
        stride: [1, 2],
        dilation: [2, 1],
        padding: Padding::Explicit([1, 0]),
        ..ConvSettings::conv2d(3, [2, 3])
    };
    let c2 = ConvSettings {
        padding: Padding::Same,
        ..ConvSettings::conv2d(2, [3, 3])
    };
    b.push(None, Activation::Elu { alpha: 0.5 }, |s| Conv::new(&c1, s))
        .unwrap();
    b.push(None, Activation::Tanh, |s| Conv::new(&c2, s))
        .unwrap();
    b.push(None, Activation::Identity, GlobalAvgPool::new)
        .unwrap();
    b.push(None, Activation::Identity, |s| Dense::new(2, s))
        .unwrap();
    b.finish().unwrap()
}

/// ReLU conv1d, max-pool1d, avg-pool1d; ReLU conv2d, overlapping max-pool2d, avg-pool2d.
pub fn pools() -> Graph {
    let mut b = GraphBuilder::new(
        Shape::Image {
            channels: 1,
            height: 7,
            width: 7,
        },
        LossConfig::cross_entropy(),
    );
    b.push(None, Activation::Relu, |s| {
        Conv::new(&ConvSettings::conv2d(2, [2, 2]), s)
    })
    .unwrap();
    b.push(None, Activation::Identity, |s| {
        Pool::new(PoolKind::Max, 2, [3, 3], [2, 2], s)
    })
    .unwrap();
    b.push(None, Activation::Identity, |s| {
        Pool::new(PoolKind::Avg, 2, [1, 2], [1, 1], s)
    })
    .unwrap();
    b.push(None, Activation::Identity, Flatten::new).unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(3, s))
        .unwrap();
    b.finish().unwrap()
}

/// A 1-D ReLU network with max-pool1d and avg-pool1d.
pub fn pools1d() -> Graph {
    let mut b = GraphBuilder::new(
        Shape::Signal {
            channels: 1,
            length: 12,
        },
        LossConfig::cross_entropy(),
    );
    b.push(None, Activation::Relu, |s| {
        Conv::new(&ConvSettings::conv1d(2, 3), s)
    })
    .unwrap();
    b.push(None, Activation::Identity, |s| {
        Pool::new(PoolKind::Max, 1, [1, 2], [1, 2], s)
    })
    .unwrap();
    b.push(None, Activation::Identity, |s| {
        Pool::new(PoolKind::Avg, 1, [1, 2], [1, 1], s)
    })
    .unwrap();
    b.push(None, Activation::Identity, Flatten::new).unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(2, s))
        .unwrap();
    b.finish().unwrap()
}

/// conv1d, batch-norm per channel, tanh; flatten; dense, batch-norm per feature with a large
/// epsilon (so that `norm-epsilon-misplaced` shows), sigmoid output.
pub fn batch_norm() -> Graph {
    let mut b = GraphBuilder::new(
        Shape::Signal {
            channels: 2,
            length: 6,
        },
        LossConfig::cross_entropy(),
    );
    b.push(None, Activation::Identity, |s| {
        Conv::new(&ConvSettings::conv1d(3, 2), s)
    })
    .unwrap();
    b.push(None, Activation::Tanh, |s| BatchNorm::new(1e-5, s))
        .unwrap();
    b.push(None, Activation::Identity, Flatten::new).unwrap();
    b.push(None, Activation::Identity, |s| Dense::new(4, s))
        .unwrap();
    b.push(None, Activation::Sigmoid, |s| BatchNorm::new(0.5, s))
        .unwrap();
    b.finish().unwrap()
}

/// layer-norm over a signal's channels, rms-norm (a large epsilon) over a dense layer's features,
/// L2 on weights and biases.
pub fn norms() -> Graph {
    let mut b = GraphBuilder::new(
        Shape::Signal {
            channels: 3,
            length: 4,
        },
        LossConfig {
            l2: 0.1,
            l2_on_bias: true,
            ..LossConfig::squared_error()
        },
    );
    b.push(None, Activation::Softplus, |s| LayerNorm::new(1e-5, s))
        .unwrap();
    b.push(None, Activation::Identity, Flatten::new).unwrap();
    b.push(None, Activation::Identity, |s| Dense::new(5, s))
        .unwrap();
    b.push(None, Activation::Gelu, |s| RmsNorm::new(0.2, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| Dense::new(2, s))
        .unwrap();
    b.finish().unwrap()
}

/// A 1-D residual block: conv "a" (relu), conv "same", batch-norm, add from "a", relu, max-pool,
/// dense softmax: the shape of the demo's CNN.
pub fn residual() -> Graph {
    let mut b = GraphBuilder::new(
        Shape::Signal {
            channels: 1,
            length: 10,
        },
        LossConfig::cross_entropy(),
    );
    let same = ConvSettings {
        padding: Padding::Same,
        ..ConvSettings::conv1d(3, 3)
    };
    b.push(Some("a"), Activation::Relu, |s| {
        Conv::new(&ConvSettings::conv1d(3, 3), s)
    })
    .unwrap();
    b.push(None, Activation::Identity, |s| Conv::new(&same, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| BatchNorm::new(1e-5, s))
        .unwrap();
    b.push(None, Activation::Relu, |s| Add::new("a", s))
        .unwrap();
    b.push(None, Activation::Identity, |s| {
        Pool::new(PoolKind::Max, 1, [1, 2], [1, 2], s)
    })
    .unwrap();
    b.push(None, Activation::Identity, Flatten::new).unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(3, s))
        .unwrap();
    b.finish().unwrap()
}

/// Token ids, embedding, gru (reset before, all steps), per-step dense softmax.
pub fn embedding() -> Graph {
    let mut b = GraphBuilder::new(
        Shape::Tokens {
            steps: 4,
            vocabulary: 6,
        },
        LossConfig::cross_entropy(),
    );
    b.push(None, Activation::Identity, |s| Embedding::new(3, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| {
        Gru::new(3, "zrn", "before", "all", s)
    })
    .unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(2, s))
        .unwrap();
    b.finish().unwrap()
}

/// A tanh rnn over a sequence, last output, dense.
pub fn rnn() -> Graph {
    let mut b = GraphBuilder::new(
        Shape::Sequence { steps: 5, width: 2 },
        LossConfig::squared_error(),
    );
    b.push(None, Activation::Identity, |s| {
        Rnn::new(4, Activation::Tanh, "last", s)
    })
    .unwrap();
    b.push(None, Activation::Identity, |s| Dense::new(2, s))
        .unwrap();
    b.finish().unwrap()
}

/// An lstm in gate order "gifo" under a gru (reset after), last output, dense softmax.
pub fn lstm() -> Graph {
    let mut b = GraphBuilder::new(
        Shape::Sequence { steps: 4, width: 2 },
        LossConfig {
            l2: 0.02,
            ..LossConfig::cross_entropy()
        },
    );
    b.push(None, Activation::Identity, |s| {
        Lstm::new(3, "gifo", "all", s)
    })
    .unwrap();
    b.push(None, Activation::Identity, |s| {
        Gru::new(2, "rzn", "after", "last", s)
    })
    .unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(3, s))
        .unwrap();
    b.finish().unwrap()
}

/// conv1d read as a sequence by causal two-head attention, then open one-head attention, layer
/// norm, dense per step.
pub fn attention() -> Graph {
    let mut b = GraphBuilder::new(
        Shape::Signal {
            channels: 2,
            length: 5,
        },
        LossConfig::squared_error(),
    );
    b.push(None, Activation::Identity, |s| {
        Conv::new(&ConvSettings::conv1d(4, 2), s)
    })
    .unwrap();
    b.push(None, Activation::Identity, |s| Attention::new(2, true, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| Attention::new(1, false, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| LayerNorm::new(1e-5, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| Dense::new(2, s))
        .unwrap();
    b.finish().unwrap()
}

/// Random parameters: weights scaled by 1/√fan-in, biases and shifts small, scales near 1.
pub fn random_params(g: &Graph, rng: &mut Rng) -> Vec<ArrayD<f64>> {
    g.tensors()
        .iter()
        .map(|t| {
            let sd = 1.0 / (t.spec.fan_in.max(1) as f64).sqrt();
            ArrayD::from_shape_fn(IxDyn(&t.spec.shape), |_| match t.spec.role {
                Role::Scale => 1.0 + 0.3 * rng.normal(),
                Role::Bias | Role::Shift => 0.2 * rng.normal(),
                _ => sd * rng.normal(),
            })
        })
        .collect()
}

/// A batch: normal inputs (token ids for a token input) and targets fitting the loss.
pub fn case(graph: Graph, m: usize, seed: u64) -> Case {
    let mut rng = Rng::new(seed);
    let params = random_params(&graph, &mut rng);
    let x = match graph.input() {
        Shape::Tokens { steps, vocabulary } => {
            Array2::from_shape_fn((m, steps), |_| rng.below(vocabulary) as f64)
        }
        s => Array2::from_shape_fn((m, s.size()), |_| rng.normal()),
    };
    let out = graph.output();
    let last = graph.nodes().last().unwrap().activation;
    let size = out.size();
    let width = *out.dims().last().unwrap();
    let y = match (graph.loss_config().loss, last) {
        (Loss::CrossEntropy, Activation::Softmax) => {
            let mut y = Array2::zeros((m, size));
            for i in 0..m {
                for r in 0..size / width {
                    y[[i, r * width + rng.below(width)]] = 1.0;
                }
            }
            y
        }
        (Loss::CrossEntropy, _) => {
            Array2::from_shape_fn((m, size), |_| (rng.uniform() < 0.5) as u8 as f64)
        }
        _ => Array2::from_shape_fn((m, size), |_| rng.normal()),
    };
    Case {
        graph,
        params,
        x,
        y,
    }
}

/// A batch of `m` from `seed` with every parameter times `scale`, all values as f32 holds
/// them, and the engine's f64 gradient there (the truth).
pub fn scaled(graph: Graph, m: usize, scale: f64, seed: u64) -> (Case, Vec<ArrayD<f64>>) {
    let mut c = case(graph, m, 500 + seed);
    for p in &mut c.params {
        p.mapv_inplace(|v| (scale * v) as f32 as f64);
    }
    c.x.mapv_inplace(|v| v as f32 as f64);
    c.y.mapv_inplace(|v| v as f32 as f64);
    let truth = c.gradient();
    (c, truth)
}

pub fn config(method: Method, precision: Precision, seed: u64) -> CheckConfig {
    CheckConfig {
        seed,
        ..CheckConfig::new(method, precision)
    }
}

/// The demo CNN (examples/pump-cnn.toml) at Glorot-uniform weights from seed 1 and a synthetic
/// batch of 8.
pub fn demo_cnn() -> Case {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("../..");
    let d = GraphDescription::read(&root.join("examples/pump-cnn.toml")).unwrap();
    let params = Init::GlorotUniform.graph_params(&d.graph, &mut Rng::new(1));
    let b = Batch::graph_synthetic(&d.graph, 8, 1);
    Case {
        graph: d.graph,
        params,
        x: b.x,
        y: b.y,
    }
}

/// The engine's own gradient checked.
pub fn run(c: &Case, config: &CheckConfig) -> GraphCheck {
    check_graph(
        &c.graph,
        &c.params,
        c.x.view(),
        c.y.view(),
        config,
        &|_, _| {},
    )
    .unwrap()
}

/// A given gradient (the engine's with a planted mistake, or the truth in f64) checked.
pub fn run_given(c: &Case, given: &[ArrayD<f64>], config: &CheckConfig) -> GraphCheck {
    check_graph_gradient(
        &c.graph,
        &c.params,
        c.x.view(),
        c.y.view(),
        given,
        config,
        &|_, _| {},
    )
    .unwrap()
}

/// How many coordinates and directions got each status.
pub fn count(r: &GraphCheck, status: Status) -> (usize, usize) {
    (
        r.coords.iter().filter(|c| c.status == status).count(),
        r.directions.iter().filter(|d| d.status == status).count(),
    )
}

/// A line naming the worst coordinates, for failure messages.
pub fn worst(r: &GraphCheck) -> String {
    let mut c: Vec<_> = r.coords.iter().collect();
    c.sort_by(|a, b| plumb_fd::worst_first((a.status, a.rel_error), (b.status, b.rel_error)));
    c.iter()
        .take(3)
        .map(|c| {
            format!(
                "t{} #{} {} a={:e} n={:e} rel={:e} bound={:e}",
                c.coord.tensor,
                c.coord.index,
                c.status.name(),
                c.analytic,
                c.numeric,
                c.rel_error,
                c.bound
            )
        })
        .collect::<Vec<_>>()
        .join("; ")
}

/// A description of fixtures/nets.
pub fn net(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../../fixtures/nets")
        .join(name)
}

/// The description's weights and batch drawn from seed 3 (Glorot uniform, `samples` samples),
/// loaded as every command loads them.
pub fn loaded(name: &str, samples: usize) -> GraphLoaded {
    let desc = GraphDescription::read(&net(name)).unwrap();
    let inputs = GraphInputs::drawn(Init::GlorotUniform, 3, samples);
    GraphLoaded::load(desc, &inputs).unwrap()
}

/// A network of dense layers on `inputs` features: `layers` as (units, activation), the loss
/// and L2 strength λ with the default conventions. Its tensors are each layer's weight (units ×
/// fan-in) then bias: tensor 2l and 2l + 1 of layer l.
pub fn dense(inputs: usize, layers: &[(usize, Activation)], loss: Loss, l2: f64) -> Graph {
    let config = match loss {
        Loss::CrossEntropy => LossConfig::cross_entropy(),
        Loss::SquaredError => LossConfig {
            loss,
            ..LossConfig::cross_entropy()
        },
    };
    dense_with(inputs, layers, LossConfig { l2, ..config })
}

/// [`dense`] under a loss configuration of its own (reduction, L2 divisor, bias decay).
pub fn dense_with(inputs: usize, layers: &[(usize, Activation)], loss: LossConfig) -> Graph {
    let mut b = GraphBuilder::new(Shape::Flat(inputs), loss);
    for &(units, activation) in layers {
        b.push(None, activation, |s| Dense::new(units, s)).unwrap();
    }
    b.finish().unwrap()
}
