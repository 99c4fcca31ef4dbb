//! Data files for the layer graph, written by NumPy (fixtures/data/generate_graph.py): every
//! shape of DESIGN §5 in both axis orders, read value by value into what NumPy computes for them
//! (`np.transpose` of a channels-last array, `np.eye(classes)[labels]` for labels), and every
//! error named with its file, array and place.

use std::path::{Path, PathBuf};

use plumb_engine::graph::Shape;
use plumb_formats::{AxisOrder, DataError, read_graph_data, read_tensors};

use AxisOrder::{ChannelsFirst, ChannelsLast};

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../../fixtures/data")
        .join(name)
}

fn graph_file(case: &str) -> PathBuf {
    fixture(&format!("graph/{case}.npz"))
}

const SIGNAL: Shape = Shape::Signal {
    channels: 3,
    length: 7,
};
const IMAGE: Shape = Shape::Image {
    channels: 2,
    height: 3,
    width: 5,
};
const SEQUENCE: Shape = Shape::Sequence { steps: 6, width: 4 };
const TOKENS: Shape = Shape::Tokens {
    steps: 9,
    vocabulary: 20,
};

/// The shapes each readable case of the generator is read with.
fn readable() -> Vec<(&'static str, Shape, Shape, AxisOrder)> {
    let mut cases = vec![
        ("signal-first", SIGNAL, Shape::Flat(4), ChannelsFirst),
        ("signal-last", SIGNAL, Shape::Flat(4), ChannelsLast),
        ("image-first", IMAGE, Shape::Flat(3), ChannelsFirst),
        ("image-last", IMAGE, Shape::Flat(3), ChannelsLast),
        ("image-last-fortran", IMAGE, Shape::Flat(3), ChannelsLast),
        (
            "image-targets-last",
            Shape::Image {
                channels: 2,
                height: 4,
                width: 5,
            },
            Shape::Image {
                channels: 3,
                height: 3,
                width: 4,
            },
            ChannelsLast,
        ),
        (
            "sequence-labels",
            SEQUENCE,
            Shape::Sequence { steps: 6, width: 5 },
            ChannelsFirst,
        ),
        (
            "sequence-targets",
            SEQUENCE,
            Shape::Sequence { steps: 6, width: 5 },
            ChannelsFirst,
        ),
        (
            "tokens-steps",
            TOKENS,
            Shape::Sequence { steps: 9, width: 3 },
            ChannelsFirst,
        ),
    ];
    for dtype in [
        "tokens-int8",
        "tokens-int16",
        "tokens-int32",
        "tokens-int64",
        "tokens-uint8",
        "tokens-uint16",
        "tokens-uint32",
        "tokens-uint64",
    ] {
        cases.push((dtype, TOKENS, Shape::Flat(3), ChannelsFirst));
    }
    cases
}

/// Source: NumPy (fixtures/data/expected.npz, written by the generator from the same arrays).
#[test]
fn every_shape_and_order_reads_as_numpy_lays_it_out() {
    let expected = read_tensors(&graph_file("expected")).unwrap();
    for (case, input, output, order) in readable() {
        let batch = read_graph_data(&graph_file(case), &input, &output, order)
            .unwrap_or_else(|e| panic!("{case}: {e}"));
        for (array, got) in [("x", &batch.x), ("y", &batch.y)] {
            let want = expected.get(&format!("{case}.{array}")).unwrap();
            assert_eq!(got.dim().0, want.shape[0], "{case}.{array}: samples");
            assert_eq!(
                got.dim().1,
                want.shape[1],
                "{case}.{array}: values per sample"
            );
            // Exact: a float32 or integer value widens to float64 exactly, and a permutation
            // moves values without arithmetic.
            let got: Vec<f64> = got.iter().copied().collect();
            assert_eq!(got, want.data, "{case}.{array}");
        }
        assert_eq!(batch.x.ncols(), input.size(), "{case}");
        assert_eq!(batch.y.ncols(), output.size(), "{case}");
    }
}

/// The channels-last files hold a different layout from the engine's (else the test above would
/// prove nothing about the permutation): read without the flag, they are refused by shape, and
/// the message says the flag is the fix.
#[test]
fn the_wrong_axis_order_is_refused_with_the_fix() {
    for (case, input, output, order) in readable() {
        if order == ChannelsFirst {
            continue;
        }
        let message = error(case, &input, &output, ChannelsFirst);
        assert_has(
            &message,
            &[
                &format!("{case}.npz: array `x` has shape"),
                "with --channels-last, x would be",
                "the file holds that order: add --channels-last",
            ],
        );
    }
    let message = error("signal-first", &SIGNAL, &Shape::Flat(4), ChannelsLast);
    assert_has(
        &message,
        &[
            "signal-first.npz: array `x` has shape (5, 3, 7)",
            "the network's input is [3, 7] (channels, length)",
            "x must be (samples, 7, 3), axes (samples, length, channels)",
            "without --channels-last, x would be (samples, 3, 7), axes (samples, channels, length)",
            "the file holds that order: drop --channels-last",
        ],
    );
}

fn error(case: &str, input: &Shape, output: &Shape, order: AxisOrder) -> String {
    match read_graph_data(&graph_file(case), input, output, order) {
        Ok(_) => panic!("{case} was read"),
        Err(e) => e.to_string(),
    }
}

fn assert_has(message: &str, parts: &[&str]) {
    for part in parts {
        assert!(message.contains(part), "`{part}` not in: {message}");
    }
}

#[test]
fn token_errors_name_the_file_sample_and_step() {
    let flat3 = Shape::Flat(3);
    assert_has(
        &error("tokens-out-of-range", &TOKENS, &flat3, ChannelsFirst),
        &[
            "tokens-out-of-range.npz: array `x`, element [2, 5] (sample 2, step 5)",
            "the token id 20 is outside the vocabulary: ids run from 0 to 19",
            "vocabulary = 20",
        ],
    );
    assert_has(
        &error("tokens-negative", &TOKENS, &flat3, ChannelsFirst),
        &[
            "tokens-negative.npz: array `x`, element [1, 0] (sample 1, step 0)",
            "the token id -1 is outside the vocabulary",
        ],
    );
    let message = error("tokens-float", &TOKENS, &flat3, ChannelsFirst);
    assert_has(
        &message,
        &[
            "tokens-float.npz: array `x` is float64",
            "[9] (token ids below 20)",
            "integer token ids",
            "x.astype(np.int64)",
        ],
    );
    assert!(!message.contains("not a whole number"), "{message}");
    assert_has(
        &error("tokens-fraction", &TOKENS, &flat3, ChannelsFirst),
        &[
            "tokens-fraction.npz: array `x` is float64",
            "element [3, 2] (sample 3, step 2) is 2.5, not a whole number",
        ],
    );
    // Token ids where floats are expected are fine (integers widen exactly), but a float array
    // where ids are expected is not: the check is on the dtype, not the values.
    let wrong_rank = error(
        "tokens-int64",
        &Shape::Tokens {
            steps: 8,
            vocabulary: 20,
        },
        &flat3,
        ChannelsFirst,
    );
    assert_has(
        &wrong_rank,
        &[
            "array `x` has shape (4, 9)",
            "x must be (samples, 8), axes (samples, steps) of integer token ids",
        ],
    );
    assert!(!wrong_rank.contains("channels-last"), "{wrong_rank}");
}

#[test]
fn label_errors_name_the_file_sample_and_step() {
    assert_has(
        &error(
            "labels-out-of-range",
            &SIGNAL,
            &Shape::Flat(4),
            ChannelsFirst,
        ),
        &[
            "labels-out-of-range.npz: array `y`, element [3] (sample 3): the value 4 is outside 0..=3",
            "labels are integers 0 to 3 (the output layer has 4 units)",
        ],
    );
    assert_has(
        &error("labels-fraction", &SIGNAL, &Shape::Flat(4), ChannelsFirst),
        &[
            "labels-fraction.npz: array `y`, element [2] (sample 2): the value 1.5 is not an integer class label",
        ],
    );
    let per_step = Shape::Sequence { steps: 6, width: 5 };
    assert_has(
        &error(
            "steps-labels-out-of-range",
            &SEQUENCE,
            &per_step,
            ChannelsFirst,
        ),
        &[
            "steps-labels-out-of-range.npz: array `y`, element [2, 4] (sample 2, step 4): the value 5 is outside 0..=4",
        ],
    );
    assert_has(
        &error(
            "sequence-labels-wrong-steps",
            &SEQUENCE,
            &per_step,
            ChannelsFirst,
        ),
        &[
            "sequence-labels-wrong-steps.npz: array `y` has shape (3, 5)",
            "the network's output is [6, 5] (steps, width)",
            "y must be (3, 6, 5) (samples, steps, outputs) of targets, or (3, 6) of per-step class labels 0 to 4",
        ],
    );
    // Per-step labels are refused for a network whose output is one vector.
    assert_has(
        &error("sequence-labels", &SEQUENCE, &Shape::Flat(5), ChannelsFirst),
        &[
            "array `y` has shape (3, 6)",
            "y must be (3, 5) of targets, or (3,) / (3, 1) of class labels 0 to 4",
        ],
    );
}

#[test]
fn shape_and_value_errors_name_the_file_and_the_expected_shape() {
    let flat4 = Shape::Flat(4);
    for case in ["signal-wrong-rank", "signal-wrong-size"] {
        assert_has(
            &error(case, &SIGNAL, &flat4, ChannelsFirst),
            &[
                &format!("{case}.npz: array `x` has shape"),
                "x must be (samples, 3, 7), axes (samples, channels, length)",
                "with --channels-last, x would be (samples, 7, 3), axes (samples, length, channels)",
            ],
        );
    }
    let message = error("signal-wrong-size", &SIGNAL, &flat4, ChannelsFirst);
    assert!(!message.contains("the file holds that order"), "{message}");
    assert_has(
        &error("image-nan", &IMAGE, &Shape::Flat(3), ChannelsFirst),
        &[
            "image-nan.npz: array `x`, element [1, 0, 2, 3] (sample 1, channel 0, row 2, column 3): NaN is not finite",
        ],
    );
    // The place is the file's: channels-last names the channel last.
    assert_has(
        &error("image-last-inf", &IMAGE, &Shape::Flat(3), ChannelsLast),
        &[
            "image-last-inf.npz: array `x`, element [2, 1, 4, 0] (sample 2, row 1, column 4, channel 0): inf is not finite",
        ],
    );
    assert_has(
        &error("no-y", &SIGNAL, &flat4, ChannelsFirst),
        &["no-y.npz: no array `y` (the archive holds `x`)"],
    );
    assert_has(
        &error("no-samples", &SIGNAL, &flat4, ChannelsFirst),
        &["no-samples.npz: array `x` holds no samples (its first axis has length 0)"],
    );
    // The output's shape is checked against y in the declared order too.
    assert_has(
        &error(
            "image-targets-last",
            &Shape::Image {
                channels: 2,
                height: 4,
                width: 5,
            },
            &Shape::Image {
                channels: 3,
                height: 3,
                width: 5,
            },
            ChannelsLast,
        ),
        &[
            "array `y` has shape (3, 3, 4, 3)",
            "y must be (3, 3, 5, 3) (samples, height, width, channels) of targets",
            "without --channels-last, y would be (samples, 3, 3, 5)",
        ],
    );
}

/// For y alone the flag is not the fix: x and y are read in one order.
#[test]
fn targets_in_the_other_order_than_x_are_named() {
    // x (3, 4, 5, 2) read channels-first as [4, 5, 2]; y (3, 3, 4, 3) is the output [3, 3, 4]
    // channels-last.
    let input = Shape::Image {
        channels: 4,
        height: 5,
        width: 2,
    };
    let output = Shape::Image {
        channels: 3,
        height: 3,
        width: 4,
    };
    assert_has(
        &error("image-targets-last", &input, &output, ChannelsFirst),
        &[
            "array `y` has shape (3, 3, 4, 3)",
            "y must be (3, 3, 3, 4) (samples, channels, height, width) of targets",
            "with --channels-last, y would be (samples, 3, 4, 3)",
            "y holds that order, but x and y are read in one order: save both alike",
        ],
    );
}

#[test]
fn csv_holds_flat_data_only_and_the_flag_needs_channels() {
    let csv = fixture("small.csv");
    let message = read_graph_data(&csv, &SIGNAL, &Shape::Flat(4), ChannelsFirst)
        .unwrap_err()
        .to_string();
    assert_has(
        &message,
        &[
            "small.csv: CSV holds flat data only",
            "the network's input is [3, 7] (channels, length)",
            "np.savez",
        ],
    );
    // A flat input reads as today's reader reads it.
    let header = std::fs::read_to_string(&csv).unwrap();
    let columns = header.lines().next().unwrap().split(',').count();
    let inputs = columns - 1;
    let batch = read_graph_data(&csv, &Shape::Flat(inputs), &Shape::Flat(1), ChannelsFirst);
    let today = plumb_formats::read_data(&csv, inputs, 1);
    assert_eq!(batch.unwrap(), today.unwrap());

    for (input, file) in [
        (SEQUENCE, graph_file("sequence-targets")),
        (TOKENS, graph_file("tokens-int8")),
        (Shape::Flat(4), csv.clone()),
    ] {
        let e = read_graph_data(&file, &input, &Shape::Flat(3), ChannelsLast).unwrap_err();
        assert!(matches!(e, DataError::ChannelsLastNotSpatial { .. }), "{e}");
        assert_has(
            &e.to_string(),
            &["has no channel axis; drop --channels-last"],
        );
    }
}

/// Arrays of random ranks and lengths, read as random shapes in either order, never make the
/// reader panic: each read is a batch of the declared sizes, or an error naming the file. (Cut
/// and damaged archives are the NPZ reader's, swept in malformed.rs.)
#[test]
fn random_arrays_against_random_shapes_never_panic() {
    use plumb_engine::Rng;
    use plumb_formats::{DType, FileFormat, Tensor, write_tensors};
    let dir = std::env::temp_dir().join(format!("plumb-graph-data-random-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    let mut rng = Rng::new(2026);
    let mut len = |rng: &mut Rng| 1 + rng.below(3);
    let shape = |rng: &mut Rng, len: &mut dyn FnMut(&mut Rng) -> usize| match rng.below(5) {
        0 => Shape::Flat(len(rng)),
        1 => Shape::Signal {
            channels: len(rng),
            length: len(rng),
        },
        2 => Shape::Image {
            channels: len(rng),
            height: len(rng),
            width: len(rng),
        },
        3 => Shape::Sequence {
            steps: len(rng),
            width: len(rng),
        },
        _ => Shape::Tokens {
            steps: len(rng),
            vocabulary: len(rng),
        },
    };
    // One sample's axes as the file holds them.
    let file_dims = |shape: &Shape, order: AxisOrder| match (*shape, order) {
        (Shape::Signal { channels, length }, ChannelsLast) => vec![length, channels],
        (
            Shape::Image {
                channels,
                height,
                width,
            },
            ChannelsLast,
        ) => vec![height, width, channels],
        (s, _) => s.dims(),
    };
    let (mut read, mut refused) = (0, 0);
    for trial in 0..1000 {
        let input = shape(&mut rng, &mut len);
        let output = match shape(&mut rng, &mut len) {
            Shape::Tokens { steps, .. } => Shape::Flat(steps),
            s => s,
        };
        let order = if rng.below(2) == 0 {
            ChannelsFirst
        } else {
            ChannelsLast
        };
        let m = rng.below(4);
        // Mostly the shapes the reader takes (targets, labels, per-step labels), sometimes any.
        let mut x_dims = vec![m];
        x_dims.extend(file_dims(&input, order));
        let mut y_dims = vec![m];
        match rng.below(4) {
            0 => y_dims.extend(file_dims(&output, order)),
            1 => {}
            2 => y_dims.push(output.dims()[0]),
            _ => y_dims = (0..rng.below(5)).map(|_| rng.below(4)).collect(),
        }
        if rng.below(4) == 0 {
            x_dims = (0..rng.below(5)).map(|_| rng.below(4)).collect();
        }
        let array = |name: &str, dims: Vec<usize>, rng: &mut Rng| {
            let n = dims.iter().product();
            // Whole numbers from −1 to 3: token ids and labels both in and out of range.
            let data = (0..n).map(|_| rng.below(5) as f64 - 1.0).collect();
            Tensor {
                name: name.into(),
                shape: dims,
                dtype: DType::F64,
                data,
            }
        };
        let (x, y) = (array("x", x_dims, &mut rng), array("y", y_dims, &mut rng));
        let path = dir.join(format!("t{trial}.npz"));
        write_tensors(&path, FileFormat::Npz, &[x, y], DType::F64).unwrap();
        let outcome = std::panic::catch_unwind(|| read_graph_data(&path, &input, &output, order));
        match outcome {
            Ok(Ok(batch)) => {
                assert_eq!(batch.x.ncols(), input.size());
                assert_eq!(batch.y.ncols(), output.size());
                assert_eq!(batch.x.nrows(), batch.y.nrows());
                read += 1;
            }
            Ok(Err(e)) => {
                assert!(e.to_string().contains(&format!("t{trial}.npz")), "{e}");
                refused += 1;
            }
            Err(_) => panic!("trial {trial}: {input} / {output} / {order:?} panicked"),
        }
    }
    // Both outcomes are exercised (float x for token inputs is refused by dtype, so reads come
    // from the other shapes).
    assert!(read > 50 && refused > 50, "{read} read, {refused} refused");
    std::fs::remove_dir_all(&dir).unwrap();
}

/// What the reader returns is what the engine takes: batches read for a graph pass its
/// `check_batch`, and give a finite loss at seeded weights.
#[test]
fn read_batches_pass_the_graphs_check() {
    use plumb_engine::graph::{
        Conv, ConvSettings, Dense, Embedding, Flatten, GraphBuilder, LossConfig, Lstm,
    };
    use plumb_engine::{Activation, Init, Rng};
    let mut conv = GraphBuilder::new(IMAGE, LossConfig::cross_entropy());
    conv.push(None, Activation::Relu, |s| {
        Conv::new(&ConvSettings::conv2d(4, [2, 2]), s)
    })
    .unwrap();
    conv.push(None, Activation::Identity, Flatten::new).unwrap();
    conv.push(None, Activation::Softmax, |s| Dense::new(3, s))
        .unwrap();
    let conv = conv.finish().unwrap();
    let mut tokens = GraphBuilder::new(TOKENS, LossConfig::cross_entropy());
    tokens
        .push(None, Activation::Identity, |s| Embedding::new(4, s))
        .unwrap();
    tokens
        .push(None, Activation::Identity, |s| {
            Lstm::new(5, "ifgo", "all", s)
        })
        .unwrap();
    tokens
        .push(None, Activation::Softmax, |s| Dense::new(3, s))
        .unwrap();
    let tokens = tokens.finish().unwrap();
    for (case, graph, order) in [
        ("image-first", &conv, ChannelsFirst),
        ("image-last", &conv, ChannelsLast),
        ("image-last-fortran", &conv, ChannelsLast),
        ("tokens-steps", &tokens, ChannelsFirst),
    ] {
        let batch =
            read_graph_data(&graph_file(case), &graph.input(), &graph.output(), order).unwrap();
        graph
            .check_batch(batch.x.view(), batch.y.view())
            .unwrap_or_else(|e| panic!("{case}: {e}"));
        let params = Init::GlorotUniform.graph_params(graph, &mut Rng::new(1));
        let loss = graph.loss(&params, batch.x.view(), batch.y.view());
        assert!(loss.is_finite() && loss > 0.0, "{case}: {loss}");
    }
}

/// `read_graph_data_kept` keeps a flat f32 x of a stored archive in f32: widened, its values
/// are `read_graph_data`'s (tested against NumPy above) exactly, y is the same, and a value that
/// is not finite is refused with the same message; an f64 x, or an input that is not flat,
/// is widened as read. The archives are written by `write_tensors` (stored, as `np.savez`
/// writes them), 200 × 784 values: five of the reader's 128 KiB pieces.
#[test]
fn a_flat_f32_batch_is_kept_in_f32_with_the_same_values_and_messages() {
    use plumb_engine::Features;
    use plumb_formats::{DType, FileFormat, Tensor, read_graph_data_kept, write_tensors};
    let folder = std::env::temp_dir().join(format!("plumb-kept-{}", std::process::id()));
    std::fs::create_dir_all(&folder).unwrap();
    let (m, n) = (200, 784);
    let x: Vec<f64> = (0..m * n)
        .map(|i| f64::from(((i * 7919) % 1000) as f32 / 37.0 - 13.0))
        .collect();
    let y: Vec<f64> = (0..m).map(|i| (i % 10) as f64).collect();
    let write_shaped = |name: &str, x: &[f64], shape: Vec<usize>, dtype: DType| {
        let path = folder.join(name);
        let tensors = [
            Tensor::new("x", shape, x.to_vec()),
            Tensor::new("y", vec![m], y.clone()),
        ];
        write_tensors(&path, FileFormat::Npz, &tensors, dtype).unwrap();
        path
    };
    let write = |name: &str, x: &[f64], dtype: DType| write_shaped(name, x, vec![m, n], dtype);
    let (input, output) = (Shape::Flat(n), Shape::Flat(10));
    let path = write("f32.npz", &x, DType::F32);
    let wide = read_graph_data(&path, &input, &output, ChannelsFirst).unwrap();
    let kept = read_graph_data_kept(&path, &input, &output, ChannelsFirst).unwrap();
    let Features::F32(narrow) = &kept.x else {
        panic!("an f32 x is kept in f32");
    };
    assert_eq!(narrow.mapv(f64::from), wide.x);
    assert_eq!(kept.y, wide.y);
    let path = write("f64.npz", &x, DType::F64);
    let kept = read_graph_data_kept(&path, &input, &output, ChannelsFirst).unwrap();
    assert!(
        matches!(kept.x, Features::F64(_)),
        "an f64 x is read as f64"
    );
    // Not flat: the same f32 values as 784 steps of one feature are widened as read.
    let steps = Shape::Sequence { steps: n, width: 1 };
    let path = write_shaped("steps.npz", &x, vec![m, n, 1], DType::F32);
    let kept = read_graph_data_kept(&path, &steps, &output, ChannelsFirst).unwrap();
    assert_eq!(kept.x, Features::F64(wide.x.clone()));
    for (flat, bad) in [(3, f64::NAN), (150 * n + 700, f64::INFINITY)] {
        let mut x = x.clone();
        x[flat] = bad;
        let path = write("bad.npz", &x, DType::F32);
        let wide = read_graph_data(&path, &input, &output, ChannelsFirst).unwrap_err();
        let kept = read_graph_data_kept(&path, &input, &output, ChannelsFirst).unwrap_err();
        assert_eq!(kept.to_string(), wide.to_string());
        assert!(
            kept.to_string()
                .contains(&format!("sample {}, feature {}", flat / n, flat % n)),
            "{kept}"
        );
    }
    std::fs::remove_dir_all(&folder).unwrap();
}
