//! Seeded initial weights and synthetic batches for the layer graph: the spread of every weight
//! tensor against the published formulas, the fixed values of the other roles, reproducibility,
//! and synthetic batches that every kind's graph accepts.

use ndarray::{Array2, ArrayD, s};
use plumb_engine::graph::{
    Add, Attention, BatchNorm, Conv, ConvSettings, Dense, Embedding, Flatten, GlobalAvgPool, Graph,
    GraphBuilder, Gru, LayerNorm, LossConfig, Lstm, Pool, PoolKind, RmsNorm, Rnn, Role, Shape,
};
use plumb_engine::{Activation, Batch, Init, Loss, Rng};

/// Conv2d 16 → 64 channels, kernel 3 × 5, then global pooling and two dense layers.
fn conv_graph() -> Graph {
    let input = Shape::Image {
        channels: 16,
        height: 9,
        width: 11,
    };
    let mut b = GraphBuilder::new(input, LossConfig::cross_entropy());
    b.push(None, Activation::Relu, |s| {
        Conv::new(&ConvSettings::conv2d(64, [3, 5]), s)
    })
    .unwrap();
    b.push(None, Activation::Identity, GlobalAvgPool::new)
        .unwrap();
    b.push(None, Activation::Tanh, |s| Dense::new(300, s))
        .unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(10, s))
        .unwrap();
    b.finish().unwrap()
}

/// Tokens → embedding → lstm (all steps) → attention → layer-norm → per-step dense softmax.
fn sequence_graph() -> Graph {
    let input = Shape::Tokens {
        steps: 6,
        vocabulary: 400,
    };
    let mut b = GraphBuilder::new(input, LossConfig::cross_entropy());
    b.push(None, Activation::Identity, |s| Embedding::new(40, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| {
        Lstm::new(60, "ifgo", "all", s)
    })
    .unwrap();
    b.push(None, Activation::Identity, |s| Attention::new(3, true, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| LayerNorm::new(1e-5, s))
        .unwrap();
    b.push(None, Activation::Softmax, |s| Dense::new(5, s))
        .unwrap();
    b.finish().unwrap()
}

/// The fan-in and fan-out of each weight tensor of a graph, worked out here from the layer
/// settings rather than read from the engine's ParamSpec. A convolution's fan-in is in-channels ×
/// kernel area (He et al., ICCV 2015, §2.2: n = k²c) and its fan-out out-channels × kernel area;
/// a stacked recurrent weight is one matrix of blocks·units rows.
type Fans = &'static [(&'static str, usize, usize)];

const CONV_FANS: Fans = &[
    ("layer1.weight", 16 * 3 * 5, 64 * 3 * 5),
    ("layer3.weight", 64, 300),
    ("layer4.weight", 300, 10),
];

const SEQUENCE_FANS: Fans = &[
    ("layer2.input.weight", 40, 4 * 60),
    ("layer2.recurrent.weight", 60, 4 * 60),
    ("layer3.query.weight", 60, 60),
    ("layer3.key.weight", 60, 60),
    ("layer3.value.weight", 60, 60),
    ("layer3.output.weight", 60, 60),
    ("layer5.weight", 60, 5),
];

/// The standard deviation each scheme prescribes, written from the papers:
/// Glorot & Bengio (AISTATS 2010), eq. 12 and 16: Var = 2 / (fan_in + fan_out), the uniform
/// version on ±√6 / √(fan_in + fan_out); He, Zhang, Ren & Sun (ICCV 2015), eq. 10:
/// Var = 2 / fan_in; LeCun, Bottou, Orr & Müller (1998): Var = 1 / fan_in. U(−a, a) has standard
/// deviation a / √3 [pub: any probability text].
fn published_sd(init: Init, fan_in: usize, fan_out: usize) -> f64 {
    let (i, o) = (fan_in as f64, fan_out as f64);
    match init {
        Init::GlorotUniform => (6.0 / (i + o)).sqrt() / 3f64.sqrt(),
        Init::GlorotNormal => (2.0 / (i + o)).sqrt(),
        Init::HeUniform => (6.0 / i).sqrt() / 3f64.sqrt(),
        Init::HeNormal => (2.0 / i).sqrt(),
        Init::LecunNormal => (1.0 / i).sqrt(),
    }
}

fn moments(values: &ArrayD<f64>) -> (f64, f64) {
    let n = values.len() as f64;
    let mean = values.sum() / n;
    let var = values.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / n;
    (mean, var.sqrt())
}

/// Tolerance: the sample standard deviation of n draws has a relative standard error of
/// √((κ − 1) / (4n)), κ the kurtosis (3 for a normal, 9/5 for a uniform) [pub: the large-sample
/// variance of the sample variance, (μ₄ − σ⁴)/n, through the delta method]; the test allows five
/// standard errors (a false failure about once in 1.7 million tensors), and the mean five
/// standard errors σ/√n of zero.
#[test]
fn weights_have_the_published_spread_for_every_scheme() {
    let graphs = [(conv_graph(), CONV_FANS), (sequence_graph(), SEQUENCE_FANS)];
    let mut checked = 0;
    for init in Init::ALL {
        let kurtosis = if init.is_uniform() { 1.8 } else { 3.0 };
        for (g, fans) in &graphs {
            let params = init.graph_params(g, &mut Rng::new(17));
            g.check_params(&params).unwrap();
            for (t, p) in g.tensors().iter().zip(&params) {
                if t.spec.role != Role::Weight {
                    continue;
                }
                let (_, fan_in, fan_out) = *fans
                    .iter()
                    .find(|(name, _, _)| *name == t.name)
                    .unwrap_or_else(|| panic!("no expected fans for {}", t.name));
                let want = published_sd(init, fan_in, fan_out);
                let n = p.len() as f64;
                let (mean, sd) = moments(p);
                let rel_se = ((kurtosis - 1.0) / (4.0 * n)).sqrt();
                assert!(
                    (sd / want - 1.0).abs() < 5.0 * rel_se,
                    "{init} {}: sd {sd} vs {want} (n = {n}, allowed ±{:.4} relative)",
                    t.name,
                    5.0 * rel_se
                );
                assert!(
                    mean.abs() < 5.0 * want / n.sqrt(),
                    "{init} {}: mean {mean}",
                    t.name
                );
                let max = p.iter().fold(0.0f64, |m, v| m.max(v.abs()));
                if init.is_uniform() {
                    // The limit itself, and a draw this close to it among n ≥ 2,500 (a draw
                    // falls below 0.99 of it with probability 0.99ⁿ < 1e-10).
                    let limit = 3f64.sqrt() * want;
                    assert!(max <= limit && max > 0.99 * limit, "{init} {}", t.name);
                } else {
                    assert!(
                        max > 3.0 * want,
                        "{init} {}: a normal reaches past 3σ",
                        t.name
                    );
                }
                checked += 1;
            }
        }
    }
    assert_eq!(
        checked,
        Init::ALL.len() * (CONV_FANS.len() + SEQUENCE_FANS.len())
    );
}

/// Biases and shifts start at 0 and scales at 1 exactly; embedding tables are standard normal
/// whatever the scheme (the choice documented in init.rs).
#[test]
fn other_roles_take_their_documented_values() {
    let input = Shape::Signal {
        channels: 3,
        length: 20,
    };
    let mut b = GraphBuilder::new(input, LossConfig::squared_error());
    b.push(Some("c"), Activation::Identity, |s| {
        Conv::new(&ConvSettings::conv1d(4, 3), s)
    })
    .unwrap();
    b.push(None, Activation::Identity, |s| BatchNorm::new(1e-5, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| RmsNorm::new(1e-6, s))
        .unwrap();
    b.push(None, Activation::Identity, |s| {
        Gru::new(5, "rzn", "after", "last", s)
    })
    .unwrap();
    b.push(None, Activation::Identity, |s| Dense::new(2, s))
        .unwrap();
    let g = b.finish().unwrap();
    for init in Init::ALL {
        let params = init.graph_params(&g, &mut Rng::new(3));
        for (t, p) in g.tensors().iter().zip(&params) {
            match t.spec.role {
                Role::Bias | Role::Shift => assert!(p.iter().all(|&v| v == 0.0), "{}", t.name),
                Role::Scale => assert!(p.iter().all(|&v| v == 1.0), "{}", t.name),
                Role::Weight | Role::Table => {
                    assert!(p.iter().all(|v| v.is_finite()) && p.iter().any(|&v| v != 0.0))
                }
            }
        }
    }

    let tokens = Shape::Tokens {
        steps: 4,
        vocabulary: 3000,
    };
    let mut b = GraphBuilder::new(tokens, LossConfig::squared_error());
    b.push(None, Activation::Identity, |s| Embedding::new(20, s))
        .unwrap();
    b.push(None, Activation::Identity, Flatten::new).unwrap();
    let g = b.finish().unwrap();
    for init in Init::ALL {
        let table = &init.graph_params(&g, &mut Rng::new(5))[0];
        // 60,000 standard-normal draws: five standard errors as in the test above.
        let (mean, sd) = moments(table);
        let n = table.len() as f64;
        assert!(
            (sd - 1.0).abs() < 5.0 * (2.0 / (4.0 * n)).sqrt(),
            "{init}: {sd}"
        );
        assert!(mean.abs() < 5.0 / n.sqrt(), "{init}: {mean}");
    }
}

#[test]
fn the_same_seed_gives_the_same_weights() {
    let g = sequence_graph();
    for init in Init::ALL {
        let a = init.graph_params(&g, &mut Rng::new(9));
        let b = init.graph_params(&g, &mut Rng::new(9));
        let c = init.graph_params(&g, &mut Rng::new(10));
        assert_eq!(a, b, "{init}");
        assert_ne!(a, c, "{init}");
    }
}

/// A graph of dense layers draws what plumb's dense engine drew for the same network (so seeded
/// weights, reports and baselines stay the same): each layer's augmented matrix, units by
/// fan-in + 1, row by row, the bias column 0 taking no draw, a weight U(±√3·σ) or σ·N(0, 1); and
/// a synthetic batch of standard-normal rows, then one class per sample. Both orders are written
/// out here.
#[test]
fn a_dense_graph_draws_what_the_dense_engine_drew() {
    let layers = [
        (7, Activation::Tanh),
        (5, Activation::Relu),
        (3, Activation::Softmax),
    ];
    let mut b = GraphBuilder::new(Shape::Flat(4), LossConfig::cross_entropy());
    for &(units, act) in &layers {
        b.push(None, act, |s| Dense::new(units, s)).unwrap();
    }
    let g = b.finish().unwrap();
    for init in Init::ALL {
        let graph = init.graph_params(&g, &mut Rng::new(21));
        let mut rng = Rng::new(21);
        let mut fan_in = 4;
        for (j, &(units, _)) in layers.iter().enumerate() {
            let sd = init.std_dev(fan_in, units);
            let augmented = Array2::from_shape_fn((units, fan_in + 1), |(_, c)| match c {
                0 => 0.0,
                _ if init.is_uniform() => rng.range(-3f64.sqrt() * sd, 3f64.sqrt() * sd),
                _ => sd * rng.normal(),
            });
            let weight = graph[2 * j].view().into_dimensionality().unwrap();
            assert_eq!(augmented.slice(s![.., 1..]), weight, "{init} layer {j}");
            assert_eq!(
                augmented.column(0),
                graph[2 * j + 1].view().into_dimensionality().unwrap()
            );
            fan_in = units;
        }
    }
    let mut rng = Rng::new(33 ^ 0x5eed_da7a);
    let x = Array2::from_shape_fn((6, 4), |_| rng.normal());
    let mut y = Array2::zeros((6, 3));
    for mut row in y.rows_mut() {
        row[rng.below(3)] = 1.0;
    }
    assert_eq!(Batch::graph_synthetic(&g, 6, 33), Batch { x, y });
}

/// One graph per kind (and per output form), each ending in a head its loss accepts.
fn every_kind() -> Vec<(&'static str, Graph)> {
    type Build = fn(&mut GraphBuilder);
    let signal = Shape::Signal {
        channels: 2,
        length: 12,
    };
    let image = Shape::Image {
        channels: 2,
        height: 6,
        width: 7,
    };
    let sequence = Shape::Sequence { steps: 5, width: 6 };
    let tokens = Shape::Tokens {
        steps: 5,
        vocabulary: 9,
    };
    let cases: Vec<(&'static str, Shape, Loss, Build)> = vec![
        ("dense sigmoid", Shape::Flat(4), Loss::CrossEntropy, |b| {
            b.push(None, Activation::Sigmoid, |s| Dense::new(3, s))
                .unwrap();
        }),
        ("dense identity", Shape::Flat(4), Loss::SquaredError, |b| {
            b.push(None, Activation::Identity, |s| Dense::new(3, s))
                .unwrap();
        }),
        ("conv1d", signal, Loss::CrossEntropy, |b| {
            b.push(None, Activation::Relu, |s| {
                Conv::new(&ConvSettings::conv1d(3, 3), s)
            })
            .unwrap();
            b.push(None, Activation::Identity, Flatten::new).unwrap();
            b.push(None, Activation::Softmax, |s| Dense::new(3, s))
                .unwrap();
        }),
        ("conv2d + spatial output", image, Loss::SquaredError, |b| {
            b.push(None, Activation::Tanh, |s| {
                Conv::new(&ConvSettings::conv2d(3, [2, 3]), s)
            })
            .unwrap();
        }),
        ("max-pool1d", signal, Loss::CrossEntropy, |b| {
            b.push(None, Activation::Identity, |s| {
                Pool::new(PoolKind::Max, 1, [1, 2], [1, 2], s)
            })
            .unwrap();
            b.push(None, Activation::Identity, Flatten::new).unwrap();
            b.push(None, Activation::Softmax, |s| Dense::new(3, s))
                .unwrap();
        }),
        ("avg-pool2d", image, Loss::CrossEntropy, |b| {
            b.push(None, Activation::Identity, |s| {
                Pool::new(PoolKind::Avg, 2, [2, 2], [2, 2], s)
            })
            .unwrap();
            b.push(None, Activation::Identity, Flatten::new).unwrap();
            b.push(None, Activation::Softmax, |s| Dense::new(3, s))
                .unwrap();
        }),
        ("global-avg-pool", image, Loss::CrossEntropy, |b| {
            b.push(None, Activation::Identity, GlobalAvgPool::new)
                .unwrap();
            b.push(None, Activation::Sigmoid, |s| Dense::new(2, s))
                .unwrap();
        }),
        ("batch-norm", signal, Loss::CrossEntropy, |b| {
            b.push(None, Activation::Relu, |s| BatchNorm::new(1e-5, s))
                .unwrap();
            b.push(None, Activation::Identity, Flatten::new).unwrap();
            b.push(None, Activation::Softmax, |s| Dense::new(3, s))
                .unwrap();
        }),
        ("layer-norm", image, Loss::CrossEntropy, |b| {
            b.push(None, Activation::Identity, |s| LayerNorm::new(1e-5, s))
                .unwrap();
            b.push(None, Activation::Identity, Flatten::new).unwrap();
            b.push(None, Activation::Softmax, |s| Dense::new(3, s))
                .unwrap();
        }),
        ("rms-norm", Shape::Flat(5), Loss::SquaredError, |b| {
            b.push(None, Activation::Identity, |s| RmsNorm::new(1e-6, s))
                .unwrap();
            b.push(None, Activation::Identity, |s| Dense::new(2, s))
                .unwrap();
        }),
        ("add", signal, Loss::CrossEntropy, |b| {
            b.push(Some("c1"), Activation::Relu, |s| {
                let mut same = ConvSettings::conv1d(2, 3);
                same.padding = plumb_engine::graph::Padding::Same;
                Conv::new(&same, s)
            })
            .unwrap();
            b.push(None, Activation::Identity, |s| {
                Conv::new(&ConvSettings::conv1d(2, 1), s)
            })
            .unwrap();
            b.push(None, Activation::Relu, |s| Add::new("c1", s))
                .unwrap();
            b.push(None, Activation::Identity, Flatten::new).unwrap();
            b.push(None, Activation::Softmax, |s| Dense::new(3, s))
                .unwrap();
        }),
        ("rnn last", sequence, Loss::CrossEntropy, |b| {
            b.push(None, Activation::Identity, |s| {
                Rnn::new(4, Activation::Tanh, "last", s)
            })
            .unwrap();
            b.push(None, Activation::Softmax, |s| Dense::new(3, s))
                .unwrap();
        }),
        (
            "lstm all, per-step softmax",
            sequence,
            Loss::CrossEntropy,
            |b| {
                b.push(None, Activation::Identity, |s| {
                    Lstm::new(4, "ifgo", "all", s)
                })
                .unwrap();
                b.push(None, Activation::Softmax, |s| Dense::new(3, s))
                    .unwrap();
            },
        ),
        (
            "gru all, per-step sigmoid",
            sequence,
            Loss::CrossEntropy,
            |b| {
                b.push(None, Activation::Identity, |s| {
                    Gru::new(4, "zrn", "before", "all", s)
                })
                .unwrap();
                b.push(None, Activation::Sigmoid, |s| Dense::new(2, s))
                    .unwrap();
            },
        ),
        ("attention", sequence, Loss::SquaredError, |b| {
            b.push(None, Activation::Identity, |s| Attention::new(2, true, s))
                .unwrap();
        }),
        ("embedding", tokens, Loss::CrossEntropy, |b| {
            b.push(None, Activation::Identity, |s| Embedding::new(4, s))
                .unwrap();
            b.push(None, Activation::Identity, |s| {
                Lstm::new(3, "ifgo", "all", s)
            })
            .unwrap();
            b.push(None, Activation::Softmax, |s| Dense::new(4, s))
                .unwrap();
        }),
        (
            "conv1d read as a sequence",
            signal,
            Loss::CrossEntropy,
            |b| {
                b.push(None, Activation::Relu, |s| {
                    Conv::new(&ConvSettings::conv1d(3, 3), s)
                })
                .unwrap();
                b.push(None, Activation::Identity, |s| {
                    Rnn::new(4, Activation::Relu, "all", s)
                })
                .unwrap();
                b.push(None, Activation::Softmax, |s| Dense::new(3, s))
                    .unwrap();
            },
        ),
    ];
    cases
        .into_iter()
        .map(|(name, input, loss, build)| {
            let config = match loss {
                Loss::CrossEntropy => LossConfig::cross_entropy(),
                Loss::SquaredError => LossConfig::squared_error(),
            };
            let mut b = GraphBuilder::new(input, config);
            build(&mut b);
            (name, b.finish().unwrap())
        })
        .collect()
}

/// A synthetic batch passes `check_batch` for every kind, holds whole token ids in range, one
/// class per output vector for a softmax (per step for a per-step output), 0/1 for a sigmoid; its
/// loss and gradient at seeded weights are finite, and the same seed gives the same batch.
#[test]
fn synthetic_batches_fit_every_kind() {
    for (name, g) in every_kind() {
        for seed in 0..5 {
            let batch = Batch::graph_synthetic(&g, 7, seed);
            g.check_batch(batch.x.view(), batch.y.view())
                .unwrap_or_else(|e| panic!("{name}: {e}"));
            assert_eq!(batch.x.dim(), (7, g.input().size()), "{name}");
            assert_eq!(batch.y.dim(), (7, g.output().size()), "{name}");
            if let Shape::Tokens { vocabulary, .. } = g.input() {
                assert!(
                    batch
                        .x
                        .iter()
                        .all(|&v| v.fract() == 0.0 && (0.0..vocabulary as f64).contains(&v)),
                    "{name}"
                );
            }
            let last = g.nodes().last().unwrap().activation;
            let width = *g.output().dims().last().unwrap();
            match last {
                Activation::Softmax => {
                    for vector in batch.y.as_slice().unwrap().chunks(width) {
                        assert_eq!(vector.iter().filter(|&&v| v == 1.0).count(), 1, "{name}");
                        assert_eq!(vector.iter().sum::<f64>(), 1.0, "{name}");
                    }
                }
                Activation::Sigmoid => {
                    assert!(batch.y.iter().all(|&v| v == 0.0 || v == 1.0), "{name}")
                }
                _ => assert!(batch.y.iter().all(|v| v.is_finite()), "{name}"),
            }
            let params = Init::HeNormal.graph_params(&g, &mut Rng::new(seed));
            let grad = g.gradient(&params, batch.x.view(), batch.y.view(), None);
            assert!(grad.loss.is_finite(), "{name}");
            assert!(
                grad.params.iter().all(|p| p.iter().all(|v| v.is_finite())),
                "{name}"
            );
            assert_eq!(Batch::graph_synthetic(&g, 7, seed), batch, "{name}");
        }
        assert_ne!(
            Batch::graph_synthetic(&g, 7, 1),
            Batch::graph_synthetic(&g, 7, 2),
            "{name}"
        );
    }
}

/// Draws cover the classes and the vocabulary: over many samples every class and token id
/// appears (with 9 ids and 3,500 draws, a missing one has probability below 1e-170).
#[test]
fn synthetic_draws_cover_classes_and_vocabulary() {
    let (_, g) = every_kind()
        .into_iter()
        .find(|(name, _)| *name == "embedding")
        .unwrap();
    let batch = Batch::graph_synthetic(&g, 700, 4);
    for id in 0..9 {
        assert!(batch.x.iter().any(|&v| v == id as f64), "token {id}");
    }
    let y = batch.y.into_shape_with_order((700 * 5, 4)).unwrap();
    for class in 0..4 {
        assert!(y.column(class).iter().any(|&v| v == 1.0), "class {class}");
    }
}
