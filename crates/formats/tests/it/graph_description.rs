//! Descriptions of every kind onto the layer graph: shapes, tensor names and parameter counts
//! (checked against hand arithmetic from Dumoulin & Visin's convolution arithmetic, "A guide to
//! convolution arithmetic for deep learning", 2016: o = ⌊(i + 2p − k − (k − 1)(d − 1)) / s⌋ + 1),
//! the file tensors each kind implies, and errors that name the key and its line.

use std::path::Path;

use plumb_engine::graph::{Shape, Storage};
use plumb_formats::{DescriptionError, FileStorage, GraphDescription, KindSettings, Layout};

fn parse(text: &str) -> GraphDescription {
    GraphDescription::parse(Path::new("net.toml"), text).unwrap_or_else(|e| panic!("{e}"))
}

fn error(text: &str) -> DescriptionError {
    match GraphDescription::parse(Path::new("net.toml"), text) {
        Ok(d) => panic!("accepted: {:?}", d.layers),
        Err(e) => e,
    }
}

fn outputs(d: &GraphDescription) -> Vec<Shape> {
    d.graph.nodes().iter().map(|n| n.layer.output()).collect()
}

fn names(d: &GraphDescription) -> Vec<(String, Vec<usize>)> {
    d.graph
        .tensors()
        .iter()
        .map(|t| (t.name.clone(), t.spec.shape.clone()))
        .collect()
}

/// The line an error points at, and that its message has every part.
#[track_caller]
fn at(e: &DescriptionError, line: usize, parts: &[&str]) {
    assert_eq!(e.line, Some(line), "{e}");
    assert!(
        e.to_string().starts_with(&format!("net.toml:{line}:")),
        "{e}"
    );
    for p in parts {
        assert!(e.message.contains(p), "`{p}` not in: {e}");
    }
}

const IMAGE: &str = r#"
input = [3, 5, 5]
loss = "cross-entropy"

[[layer]]
kind = "conv2d"
channels = 4
kernel = 3
padding = 1
stride = 2
storage = "hwio"
activation = "relu"

[[layer]]
kind = "batch-norm"

[[layer]]
kind = "max-pool2d"
size = 2

[[layer]]
kind = "flatten"

[[layer]]
units = 2
activation = "softmax"
"#;

#[test]
fn a_conv2d_network_has_the_published_output_sizes_and_its_tensors() {
    let d = parse(IMAGE);
    // Dumoulin & Visin: i = 5, k = 3, p = 1, s = 2 → ⌊(5 + 2 − 3)/2⌋ + 1 = 3. Max-pool 2 on 3
    // (no padding, stride = size): ⌊(3 − 2)/2⌋ + 1 = 1.
    let image = |channels, height, width| Shape::Image {
        channels,
        height,
        width,
    };
    assert_eq!(
        outputs(&d),
        [
            image(4, 3, 3),
            image(4, 3, 3),
            image(4, 1, 1),
            Shape::Flat(4),
            Shape::Flat(2)
        ]
    );
    assert_eq!(
        names(&d),
        [
            ("layer1.weight".to_string(), vec![4, 3, 3, 3]),
            ("layer1.bias".into(), vec![4]),
            ("layer2.scale".into(), vec![4]),
            ("layer2.shift".into(), vec![4]),
            ("layer5.weight".into(), vec![2, 4]),
            ("layer5.bias".into(), vec![2]),
        ]
    );
    // By hand: conv 4·3·3·3 + 4 = 112; batch-norm 4 + 4 = 8; dense 2·4 + 2 = 10.
    assert_eq!(d.graph.parameters(), 112 + 8 + 10);
    // The conv weight is stored h × w × i × o; the dense layer in the default augmented layout.
    assert_eq!(d.files[0].name, "layer1.weight");
    assert_eq!(d.files[0].shape, [3, 3, 3, 4]);
    assert_eq!(d.files[0].storage.letters(), "hwio");
    assert_eq!(d.files.last().unwrap().name, "layer5");
    assert_eq!(d.files.last().unwrap().shape, [2, 5]);
    assert_eq!(d.files.last().unwrap().storage, FileStorage::Augmented);
    assert_eq!(d.files.last().unwrap().tensors, [4, 5]);
    assert!(!d.is_dense());
}

const PUMP: &str = r#"
input = [1, 64]
loss = "cross-entropy"
l2 = 0.001

[[layer]]
kind = "conv1d"
name = "c1"
channels = 4
kernel = 5
padding = "same"
activation = "relu"

[[layer]]
kind = "conv1d"
name = "c2"
channels = 4
kernel = 3
dilation = 2
padding = 2
bias = false
storage = "kio"

[[layer]]
kind = "add"
from = "c1"
activation = "leaky-relu"
slope = 0.1

[[layer]]
kind = "avg-pool1d"
size = 4
stride = 3

[[layer]]
kind = "layer-norm"
epsilon = 1e-4

[[layer]]
kind = "global-avg-pool"

[[layer]]
kind = "rms-norm"

[[layer]]
name = "out"
units = 3
activation = "softmax"
"#;

#[test]
fn a_residual_conv1d_network_with_every_one_dimensional_kind() {
    let d = parse(PUMP);
    let signal = |channels, length| Shape::Signal { channels, length };
    // "same" keeps 64. c2: i = 64, k = 3, d = 2, p = 2, s = 1 → 64 + 4 − 3 − 2 + 1 = 64, so the
    // add's shapes match. avg-pool k = 4, s = 3: ⌊(64 − 4)/3⌋ + 1 = 21.
    assert_eq!(
        outputs(&d),
        [
            signal(4, 64),
            signal(4, 64),
            signal(4, 64),
            signal(4, 21),
            signal(4, 21),
            Shape::Flat(4),
            Shape::Flat(4),
            Shape::Flat(3)
        ]
    );
    assert_eq!(
        names(&d),
        [
            ("c1.weight".to_string(), vec![4, 1, 5]),
            ("c1.bias".into(), vec![4]),
            ("c2.weight".into(), vec![4, 4, 3]),
            ("layer5.scale".into(), vec![4]),
            ("layer5.shift".into(), vec![4]),
            ("layer7.scale".into(), vec![4]),
            ("out.weight".into(), vec![3, 4]),
            ("out.bias".into(), vec![3]),
        ]
    );
    // By hand: 4·1·5 + 4 = 24; 4·4·3 = 48 (no bias); 4 + 4; 4; 3·4 + 3 = 15.
    assert_eq!(d.graph.parameters(), 24 + 48 + 8 + 4 + 15);
    let c2 = &d.files[2];
    assert_eq!(
        (c2.name.as_str(), &c2.shape[..]),
        ("c2.weight", &[3, 4, 4][..])
    );
    assert_eq!(d.files.last().unwrap().name, "out");
    let KindSettings::Conv { settings, storage } = &d.layers[1].kind else {
        panic!("{:?}", d.layers[1]);
    };
    assert_eq!((settings.dilation, settings.bias), ([1, 2], false));
    assert_eq!(storage, &Storage::parse("kio", "oik").unwrap());
    assert_eq!(d.layers[2].line, 24);
    assert_eq!(d.graph.loss_config().l2, 0.001);
}

const SEQUENCE: &str = r#"
input = { steps = 24, features = 4 }
loss = "cross-entropy"
layout = "split"

[[layer]]
kind = "lstm"
units = 8
output = "all"
gate-order = "gifo"
storage = "transposed"

[[layer]]
kind = "attention"
heads = 2
causal = true

[[layer]]
kind = "layer-norm"

[[layer]]
kind = "gru"
units = 5
reset = "before"

[[layer]]
units = 3
activation = "softmax"
weight = "head.w"
"#;

#[test]
fn a_sequence_network_with_lstm_attention_and_gru() {
    let d = parse(SEQUENCE);
    let seq = |steps, width| Shape::Sequence { steps, width };
    assert_eq!(
        outputs(&d),
        [
            seq(24, 8),
            seq(24, 8),
            seq(24, 8),
            Shape::Flat(5),
            Shape::Flat(3)
        ]
    );
    // By hand: lstm 4·8·4 + 4·8·8 + 4·8 = 416; attention 4·(8·8 + 8) = 288; layer-norm 16;
    // gru 3·5·8 + 3·5·5 + 15 + 15 = 225; dense 3·5 + 3 = 18.
    assert_eq!(d.graph.parameters(), 416 + 288 + 16 + 225 + 18);
    let files: Vec<(&str, &[usize], &str)> = d
        .files
        .iter()
        .map(|f| (f.name.as_str(), &f.shape[..], f.storage.letters()))
        .collect();
    assert_eq!(
        &files[..3],
        [
            ("layer1.input.weight", &[4, 32][..], "io"),
            ("layer1.recurrent.weight", &[8, 32][..], "io"),
            ("layer1.bias", &[32][..], "o"),
        ]
    );
    assert_eq!(files[3], ("layer2.query.weight", &[8, 8][..], "oi"));
    assert_eq!(
        &files[files.len() - 2..],
        [
            ("head.w", &[3, 5][..], "oi"),
            ("layer5.bias", &[3][..], "o")
        ]
    );
    let gru: Vec<&str> = d.graph.tensors()[d.graph.nodes()[3].tensors()]
        .iter()
        .map(|t| t.name.as_str())
        .collect();
    assert_eq!(
        gru,
        [
            "layer4.input.weight",
            "layer4.recurrent.weight",
            "layer4.input.bias",
            "layer4.recurrent.bias"
        ]
    );
}

#[test]
fn tokens_through_an_embedding_and_an_rnn() {
    let d = parse(
        r#"
input = { tokens = 12, vocabulary = 50 }
loss = "cross-entropy"

[[layer]]
kind = "embedding"
size = 6

[[layer]]
kind = "rnn"
units = 7
activation = "relu"

[[layer]]
units = 1
activation = "sigmoid"
"#,
    );
    assert_eq!(
        d.graph.input(),
        Shape::Tokens {
            steps: 12,
            vocabulary: 50
        }
    );
    assert_eq!(
        outputs(&d),
        [
            Shape::Sequence {
                steps: 12,
                width: 6
            },
            Shape::Flat(7),
            Shape::Flat(1)
        ]
    );
    // The rnn's relu is its cell's; the graph applies identity after it.
    assert_eq!(
        d.graph.nodes()[1].activation,
        plumb_engine::Activation::Identity
    );
    assert_eq!(d.layers[1].activation, plumb_engine::Activation::Relu);
    // By hand: table 50·6 = 300; rnn 7·6 + 7·7 + 7 = 98; dense 1·7 + 1 = 8.
    assert_eq!(d.graph.parameters(), 300 + 98 + 8);
    assert_eq!(d.files[0].name, "layer1.table");
    assert_eq!(d.files[0].shape, [50, 6]);
}

#[test]
fn input_spellings_and_the_older_inputs_key() {
    let tail = "loss = \"squared-error\"\n[[layer]]\nunits = 2\nactivation = \"identity\"\n";
    for head in ["inputs = 4", "input = 4", "input = [4]"] {
        let d = parse(&format!("{head}\n{tail}"));
        assert_eq!(d.graph.input(), Shape::Flat(4), "{head}");
        assert!(d.is_dense(), "{head}");
    }
    let e = error(&format!("input = 4\ninputs = 4\n{tail}"));
    at(&e, 2, &["both `input` and `inputs`"]);
    let e = error(&format!("input = [1, 2, 3, 4]\n{tail}"));
    at(&e, 1, &["4 axes"]);
    let e = error(&format!("input = {{ steps = 3, feature = 2 }}\n{tail}"));
    at(&e, 1, &["`feature`", "did you mean `features`"]);
}

/// A dense description with one layer replaced by `layer`, the rest of the file around it.
fn with_layer(layer: &str) -> String {
    format!(
        "input = [2, 16]\nloss = \"squared-error\"\n\n[[layer]]\nkind = \"conv1d\"\nname = \"c\"\nchannels = 2\nkernel = 3\npadding = 1\n\n[[layer]]\n{layer}\n\n[[layer]]\nkind = \"flatten\"\n"
    )
}

#[test]
fn errors_name_the_key_its_line_and_a_fix() {
    // The second [[layer]] starts on line 11; its first key is on line 12.
    let e = error(&with_layer("kind = \"conv1d\"\nchannels = 2\nkernal = 3"));
    at(&e, 14, &["`kernal`", "did you mean `kernel`"]);
    let e = error(&with_layer(
        "kind = \"conv1d\"\nchannels = 2\nkernel = 3\nheads = 2",
    ));
    at(&e, 15, &["`heads` is a key of attention, not of conv1d"]);
    let e = error(&with_layer("kind = \"conv3d\""));
    at(
        &e,
        12,
        &["unknown kind \"conv3d\"", "did you mean `conv1d`"],
    );
    // Dumoulin & Visin: a kernel of 20 spans 20 positions; 16 + 2·1 = 18 padded.
    let e = error(&with_layer(
        "kind = \"conv1d\"\nchannels = 2\nkernel = 20\npadding = 1",
    ));
    at(&e, 14, &["`kernel`", "spans 20 positions", "18"]);
    let e = error(&with_layer("kind = \"max-pool1d\"\nsize = 17"));
    at(&e, 13, &["`size`", "17"]);
    let e = error(&with_layer(
        "kind = \"conv1d\"\nchannels = 2\nkernel = 3\nstride = 2\npadding = \"same\"",
    ));
    at(&e, 16, &["`padding`", "stride 1"]);
    let e = error(&with_layer(
        "kind = \"conv2d\"\nchannels = 2\nkernel = [3, 3]",
    ));
    at(&e, 12, &["conv2d reads [channels, height, width]"]);
    let e = error(&with_layer(
        "kind = \"conv1d\"\nchannels = 2\nkernel = [3, 3]",
    ));
    at(&e, 14, &["`kernel` has 2 values"]);
    let e = error(&with_layer(
        "kind = \"conv1d\"\nchannels = 2\nkernel = 3\nstorage = \"oiw\"",
    ));
    at(&e, 15, &["storage \"oiw\"", "oik"]);
    let e = error(&with_layer("units = 3\nactivation = \"relu\""));
    at(&e, 11, &["dense reads", "flatten"]);
    let e = error(&with_layer("kind = \"batch-norm\"\nepsilon = 0"));
    at(&e, 13, &["`epsilon`"]);
    let e = error(
        &with_layer("kind = \"add\"\nfrom = \"later\"")
            .replace("kind = \"flatten\"", "kind = \"flatten\"\nname = \"later\""),
    );
    at(&e, 13, &["names layer 3, which comes after it"]);
    let e = error(&with_layer("kind = \"add\"\nfrom = \"nowhere\""));
    at(&e, 13, &["names no earlier layer"]);
    let e = error(&with_layer(
        "kind = \"conv1d\"\nchannels = 3\nkernel = 3\npadding = 1\n[[layer]]\nkind = \"add\"\nfrom = \"c\"",
    ));
    at(&e, 18, &["`from = \"c\"`", "[2, 16]", "[3, 16]"]);
    let e = error(&with_layer("kind = \"attention\"\nheads = 3"));
    at(
        &e,
        13,
        &["`heads`", "width 2 is not divisible by `heads = 3`"],
    );
    let e = error(&with_layer(
        "kind = \"lstm\"\nunits = 2\ngate-order = \"iifo\"",
    ));
    at(&e, 14, &["`gate-order`", "\"iifo\"", "exactly once"]);
    let e = error(&with_layer("kind = \"gru\"\nunits = 2\noutput = \"every\""));
    at(&e, 14, &["`output`", "\"every\"", "last"]);
    let e = error(&with_layer("kind = \"gru\"\nunits = 2\nreset = \"later\""));
    at(&e, 14, &["`reset`", "before"]);
    let e = error(&with_layer("kind = \"rnn\"\nunits = 2\nstorage = \"hwio\""));
    at(&e, 14, &["`storage = \"transposed\"`", "\"hwio\""]);
    let e = error(&with_layer(
        "kind = \"conv1d\"\nname = \"c\"\nchannels = 2\nkernel = 3",
    ));
    at(&e, 13, &["\"c\" is already used by layer 1"]);
    let e = error(&with_layer("kind = \"flatten\"\nactivation = \"relu\""));
    at(&e, 13, &["`activation` is a key of", "not of flatten"]);
    let e = error(&with_layer("kind = \"conv1d\"\nchannels = 0\nkernel = 3"));
    at(&e, 13, &["`channels` is 0"]);
    let e = error(&with_layer("kind = \"conv1d\"\nchannels = 2"));
    at(&e, 11, &["has no `kernel`"]);
}

#[test]
fn a_huge_layer_is_refused_before_anything_is_allocated() {
    let e = error(&with_layer(
        "kind = \"conv1d\"\nchannels = 60000000\nkernel = 3",
    ));
    at(&e, 13, &["larger than 67108864 parameters"]);
    let e = error(&with_layer(
        "kind = \"conv1d\"\nchannels = 2\nkernel = 3\npadding = 60000000",
    ));
    at(&e, 13, &["more than 67108864 values per sample"]);
    let e = error(
        "input = [60000000, 60000000, 60000000]\nloss = \"squared-error\"\n[[layer]]\nkind = \"flatten\"\n",
    );
    at(&e, 1, &["more than 67108864 values"]);
}

/// A dense description's file tensors under each layout, as docs/description.md defines them: a
/// named layer's tensors take its name; augmented units × (fan-in + 1) with the bias in column 0,
/// split units × fan-in and a bias, split-transposed fan-in × units and a bias.
#[test]
fn dense_layouts_and_names_give_the_documented_file_tensors() {
    let text = r#"
input = 4
loss = "cross-entropy"
layout = "LAYOUT"

[[layer]]
name = "hidden"
units = 5
activation = "tanh"

[[layer]]
units = 3
activation = "softmax"
"#;
    let t = |name: &str, shape: &[usize]| (name.to_string(), shape.to_vec());
    for (layout, theirs) in [
        (
            Layout::Augmented,
            vec![t("hidden", &[5, 5]), t("layer2", &[3, 6])],
        ),
        (
            Layout::Split,
            vec![
                t("hidden.weight", &[5, 4]),
                t("hidden.bias", &[5]),
                t("layer2.weight", &[3, 5]),
                t("layer2.bias", &[3]),
            ],
        ),
        (
            Layout::SplitTransposed,
            vec![
                t("hidden.weight", &[4, 5]),
                t("hidden.bias", &[5]),
                t("layer2.weight", &[5, 3]),
                t("layer2.bias", &[3]),
            ],
        ),
    ] {
        let d = parse(&text.replace("LAYOUT", layout.name()));
        let ours: Vec<(String, Vec<usize>)> = d
            .files
            .iter()
            .map(|f| (f.name.clone(), f.shape.clone()))
            .collect();
        assert_eq!(ours, theirs, "{layout}");
        assert_eq!(d.graph.parameters(), 5 * 5 + 3 * 6);
        assert!(d.is_dense());
    }
}

#[test]
fn the_demo_descriptions_of_scenarios_b_and_c_parse() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../fixtures/nets");
    let cnn = GraphDescription::read(&dir.join("pump-cnn.toml")).unwrap();
    // By hand: stem 4·1·5 + 4 = 24; its norm 4 + 4; block 4·4·3 + 4 = 52; classes 3·4 + 3 = 15.
    assert_eq!(cnn.graph.parameters(), 24 + 8 + 52 + 15);
    // "same" and padding 1 with kernel 3 keep 64; max-pool 4 gives ⌊(64 − 4)/4⌋ + 1 = 16.
    assert_eq!(
        outputs(&cnn)[4],
        Shape::Signal {
            channels: 4,
            length: 16
        }
    );
    let seq = GraphDescription::read(&dir.join("pump-sequence.toml")).unwrap();
    // By hand: lstm 4·8·4 + 4·8·8 + 4·8 = 416; attention 4·(8·8 + 8) = 288; layer-norm 16;
    // gru 3·6·8 + 3·6·6 + 2·18 = 288; classes 3·6 + 3 = 21.
    assert_eq!(seq.graph.parameters(), 416 + 288 + 16 + 288 + 21);
    assert_eq!(seq.graph.output(), Shape::Flat(3));
    for d in [&cnn, &seq] {
        assert!(!d.is_dense());
    }
}
