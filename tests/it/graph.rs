//! `plumb shapes` and `plumb grad` on descriptions of conv, pool, norm and add layers, end to end,
//! against the losses and gradients autograd gives through a plain NumPy forward pass of the same
//! networks (fixtures/graph/cases.json, written by fixtures/graph/generate.py; the files these
//! commands read are those networks written out by fixtures/graph/cli/generate.py).

use crate::util;

use plumb_formats::read_tensors;
use serde_json::Value;
use util::{fixture, plumb, scratch};

/// The networks of cases.json, by name.
const CASES: [&str; 4] = [
    "conv1d-relu-maxpool-dense",
    "conv2d-same-even-batchnorm-avgpool",
    "residual-block-1d",
    "conv2d-strided-dilated-overlapping-maxpool",
];

fn case(name: &str) -> Value {
    let text = std::fs::read_to_string(fixture("graph/cases.json")).unwrap();
    let all: Value = serde_json::from_str(&text).unwrap();
    all["cases"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| c["name"] == name)
        .unwrap_or_else(|| panic!("no case {name}"))
        .clone()
}

fn values(v: &Value) -> Vec<f64> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect()
}

/// Agreement to 1e-10 relative (the engine's acceptance bound against autograd), against the
/// tensor's largest entry for entries near zero, and with a floor of 1e-14 for a tensor whose
/// exact gradient is 0 (a conv bias under a batch norm: both sides hold rounding noise there,
/// about 1e-16).
fn assert_close(got: &[f64], want: &[f64], what: &str) {
    assert_eq!(got.len(), want.len(), "{what}: length");
    let scale = want.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    for (i, (g, w)) in got.iter().zip(want).enumerate() {
        assert!(
            (g - w).abs() <= (1e-10 * w.abs().max(scale)).max(1e-14),
            "{what}[{i}]: {g} vs {w}"
        );
    }
}

fn files(name: &str) -> (String, String, String) {
    (
        format!("graph/cli/{name}.toml"),
        format!("graph/cli/{name}-weights.npz"),
        format!("graph/cli/{name}-data.npz"),
    )
}

#[test]
fn shapes_pass_on_the_numpy_written_weights_of_every_network() {
    for name in CASES {
        let (net, weights, _) = files(name);
        let run = plumb(&["shapes", &net, "-w", &weights, "--format", "json"]);
        run.assert_code(0);
        let j = run.json();
        assert_eq!(j["verdict"], "pass", "{name}");
        assert_eq!(j["command"], "shapes");
        assert!(j["unexpected"].as_array().unwrap().is_empty(), "{name}");
        // The table and markdown forms render the same audit.
        let table = plumb(&["shapes", &net, "-w", &weights]);
        table.assert_code(0);
        assert!(table.stdout.contains("verdict: PASS"), "{}", table.stdout);
        plumb(&["shapes", &net, "-w", &weights, "--format", "markdown"]).assert_code(0);
    }
}

#[test]
fn shapes_name_a_conv_weight_stored_in_another_order() {
    let (net, _, _) = files("residual-block-1d");
    let run = plumb(&[
        "shapes",
        &net,
        "-w",
        "graph/cli/residual-block-1d-kio.npz",
        "--format",
        "json",
    ]);
    run.assert_code(1);
    let j = run.json();
    assert_eq!(j["verdict"], "fail");
    let finding = j["findings"]
        .as_array()
        .unwrap()
        .iter()
        .find(|f| f["tensor"] == "stem.weight")
        .expect("a finding on c1.weight");
    let message = finding["message"].as_str().unwrap();
    assert_eq!(finding["code"], "storage-order");
    assert!(message.contains("\"kio\""), "{message}");
    // The loss is not computed on weights that do not fit: exit 2, naming tensor and shape.
    let grad = plumb(&["grad", &net, "-w", "graph/cli/residual-block-1d-kio.npz"]);
    grad.assert_code(2);
    assert!(grad.stderr.contains("stem.weight"), "{}", grad.stderr);
    assert!(grad.stderr.contains("(4, 2, 3)"), "{}", grad.stderr);
}

#[test]
fn grad_loss_is_autograds_for_every_network() {
    for name in CASES {
        let c = case(name);
        let (net, weights, data) = files(name);
        let run = plumb(&[
            "grad", &net, "-w", &weights, "-d", &data, "--format", "json",
        ]);
        run.assert_code(0);
        let j = run.json();
        let want = c["loss_value"].as_f64().unwrap();
        let got = j["loss"].as_f64().unwrap();
        assert!(
            (got - want).abs() <= 1e-12 * want.abs(),
            "{name}: loss {got} vs autograd's {want}"
        );
        assert_eq!(j["samples"].as_u64().unwrap() as usize, {
            c["x"]["shape"][0].as_u64().unwrap() as usize
        });
        // Same data with the channel axis last.
        let last = format!("graph/cli/{name}-data-last.npz");
        let run = plumb(&[
            "grad",
            &net,
            "-w",
            &weights,
            "-d",
            &last,
            "--channels-last",
            "--format",
            "json",
        ]);
        run.assert_code(0);
        let got_last = run.json()["loss"].as_f64().unwrap();
        assert!(
            (got_last - got).abs() <= 1e-14 * got.abs(),
            "{name}: channels-last loss {got_last} vs channels-first {got}"
        );
        // Channels-last data read as channels-first does not fit (or is refused).
        let wrong = plumb(&["grad", &net, "-w", &weights, "-d", &last]);
        if wrong.code == 0 {
            panic!("{name}: channels-last data read channels-first passed");
        }
        wrong.assert_code(2);
    }
}

#[test]
fn grad_writes_every_gradient_and_the_input_gradient_in_the_declared_storage() {
    for name in CASES {
        let c = case(name);
        let (net, weights, data) = files(name);
        let dir = scratch("graph-grad");
        let out = dir.join("g.npz");
        let run = plumb(&[
            "grad",
            &net,
            "-w",
            &weights,
            "-d",
            &data,
            "-o",
            out.to_str().unwrap(),
            "--input-gradient",
            "--format",
            "json",
        ]);
        run.assert_code(0);
        let written = read_tensors(&out).unwrap();
        let want_weights = read_tensors(&fixture(&weights)).unwrap();
        // One gradient per weight tensor, named and shaped as in the weight file, then `input`.
        assert_eq!(
            written.tensors.len(),
            want_weights.tensors.len() + 1,
            "{name}"
        );
        for (k, g) in c["grads"].as_array().unwrap().iter().enumerate() {
            let w = &want_weights.tensors[k];
            let t = written
                .tensors
                .iter()
                .find(|t| t.name == w.name)
                .unwrap_or_else(|| panic!("{name}: no gradient {}", w.name));
            assert_eq!(t.shape, w.shape, "{name}: {}", w.name);
            assert_close(&t.data, &values(g), &format!("{name} {}", w.name));
        }
        let input = written.tensors.iter().find(|t| t.name == "input").unwrap();
        let mut shape = vec![c["x"]["shape"][0].as_u64().unwrap() as usize];
        shape.extend(values(&c["input"]).iter().map(|&v| v as usize));
        assert_eq!(input.shape, shape, "{name}");
        assert_close(
            &input.data,
            &values(&c["input_grad"]),
            &format!("{name} input"),
        );
        // The report lists the input's gradient as layer 0.
        let j = run.json();
        let last = j["tensors"].as_array().unwrap().last().unwrap().clone();
        assert_eq!(last["name"], "input");
        assert_eq!(last["layer"], 0);
        // No-clobber: the same output again is refused, and the file is left as it was.
        let before = std::fs::read(&out).unwrap();
        let again = plumb(&[
            "grad",
            &net,
            "-w",
            &weights,
            "-d",
            &data,
            "-o",
            out.to_str().unwrap(),
        ]);
        again.assert_code(2);
        assert!(again.stderr.contains("--force"), "{}", again.stderr);
        assert_eq!(std::fs::read(&out).unwrap(), before);
    }
}

#[test]
fn the_input_gradient_follows_the_datas_axis_order() {
    let name = "conv2d-same-even-batchnorm-avgpool";
    let c = case(name);
    let (net, weights, _) = files(name);
    let dir = scratch("graph-last");
    let out = dir.join("g.npz");
    plumb(&[
        "grad",
        &net,
        "-w",
        &weights,
        "-d",
        &format!("graph/cli/{name}-data-last.npz"),
        "--channels-last",
        "-o",
        out.to_str().unwrap(),
        "--input-gradient",
    ])
    .assert_code(0);
    let written = read_tensors(&out).unwrap();
    let input = written.tensors.iter().find(|t| t.name == "input").unwrap();
    // cases.json's input gradient is (m, c, h, w); moved to (m, h, w, c) it is the file's.
    let s: Vec<usize> = values(&c["x"]["shape"])
        .iter()
        .map(|&v| v as usize)
        .collect();
    let (m, ch, h, w) = (s[0], s[1], s[2], s[3]);
    assert_eq!(input.shape, vec![m, h, w, ch]);
    let first = values(&c["input_grad"]);
    let mut moved = Vec::with_capacity(first.len());
    for i in 0..m {
        for r in 0..h {
            for q in 0..w {
                for k in 0..ch {
                    moved.push(first[((i * ch + k) * h + r) * w + q]);
                }
            }
        }
    }
    assert_close(&input.data, &moved, "channels-last input");
}

#[test]
fn dense_descriptions_give_the_input_gradient_too() {
    // The dense report's tensors are today's, then `input` (m, features); a dense network's input
    // gradient is the graph's, so only its shape and finiteness are asserted here (the graph's
    // dense values are checked against autograd in crates/engine/tests).
    let run = plumb(&[
        "grad",
        "nets/small.toml",
        "-w",
        "weights/small-augmented.npz",
        "-d",
        "data/small.csv",
        "--input-gradient",
        "--format",
        "json",
    ]);
    run.assert_code(0);
    let j = run.json();
    let last = j["tensors"].as_array().unwrap().last().unwrap().clone();
    assert_eq!(last["name"], "input");
    assert_eq!(last["shape"][0], j["samples"]);
    assert!(last["norm"].as_f64().unwrap().is_finite());
}

#[test]
fn probe_takes_other_kinds_and_names_the_file_tensors_a_program_must_declare() {
    // Every command takes every kind; probe's runs are in tests/it/clients.rs (the NumPy CNN, LSTM
    // and attention block). A program whose hello declares other tensors than the description's
    // file tensors is refused, exit 2, with both lists.
    let (net, _, _) = files("conv1d-relu-maxpool-dense");
    let program = concat!(env!("CARGO_MANIFEST_DIR"), "/examples/python/cnn_numpy.py");
    let run = plumb(&["probe", net.as_str(), "--quiet", "--", "python3", program]);
    run.assert_code(2);
    assert!(
        run.stderr.contains("the description expects") && run.stderr.contains("c1.weight"),
        "probe: {}",
        run.stderr
    );
    assert!(!run.stderr.contains("panicked"), "{}", run.stderr);
}

#[test]
fn a_malformed_conv_description_exits_2_naming_key_and_line() {
    let dir = scratch("graph-malformed");
    let net = dir.join("bad.toml");
    std::fs::write(
        &net,
        "input = [2, 5]\nloss = \"squared-error\"\n\n[[layer]]\nkind = \"conv1d\"\nchannels = 3\nkernel = 9\n\n[[layer]]\nkind = \"flatten\"\n",
    )
    .unwrap();
    for command in ["shapes", "grad"] {
        let run = plumb(&[command, net.to_str().unwrap()]);
        run.assert_code(2);
        assert!(run.stderr.contains("kernel"), "{}", run.stderr);
        assert!(run.stderr.contains(":7:"), "{}", run.stderr);
    }
}

/// Malformed sequence inputs through the binary: each description error exits 2 naming the file,
/// the key and its line; token ids and per-step labels out of range (files written by
/// fixtures/data/generate_graph.py) exit 2 naming the file, the array, the sample and the step.
#[test]
fn malformed_sequence_inputs_exit_2_naming_the_key_or_the_file_and_place() {
    let dir = scratch("graph-malformed-sequence");
    let head = "input = { steps = 6, features = 4 }\nloss = \"squared-error\"\n\n[[layer]]\n";
    for (name, layer, line, needles) in [
        (
            "heads.toml",
            "units = 4\nactivation = \"identity\"\n\n[[layer]]\nkind = \"attention\"\nheads = 3\n",
            ":10:",
            &["`heads`", "width 4 is not divisible by `heads = 3`"][..],
        ),
        (
            "gate-order.toml",
            "kind = \"lstm\"\nunits = 2\ngate-order = \"ifgi\"\n",
            ":7:",
            &["`gate-order`", "\"ifgi\"", "exactly once"][..],
        ),
        (
            "output.toml",
            "kind = \"rnn\"\nunits = 2\noutput = \"first\"\n",
            ":7:",
            &["`output`", "\"first\"", "\"last\""][..],
        ),
    ] {
        let net = dir.join(name);
        std::fs::write(&net, format!("{head}{layer}")).unwrap();
        for command in ["shapes", "grad"] {
            let run = plumb(&[command, net.to_str().unwrap()]);
            run.assert_code(2);
            let e = &run.stderr;
            assert!(e.contains(&format!("{name}{line}")), "{name}: {e}");
            for n in needles {
                assert!(e.contains(n), "{name}: `{n}` not in {e}");
            }
        }
    }
    let tokens = dir.join("tokens.toml");
    std::fs::write(
        &tokens,
        "input = { tokens = 9, vocabulary = 20 }\nloss = \"cross-entropy\"\n\n[[layer]]\nkind = \"embedding\"\nsize = 2\n\n[[layer]]\nkind = \"rnn\"\nunits = 2\n\n[[layer]]\nunits = 3\nactivation = \"softmax\"\n",
    )
    .unwrap();
    let per_step = dir.join("per-step.toml");
    std::fs::write(
        &per_step,
        "input = { steps = 6, features = 4 }\nloss = \"cross-entropy\"\n\n[[layer]]\nkind = \"gru\"\nunits = 2\noutput = \"all\"\n\n[[layer]]\nunits = 5\nactivation = \"softmax\"\n",
    )
    .unwrap();
    for (net, data, needles) in [
        (&tokens, "data/graph/tokens-int64.npz", &[][..]),
        (
            &tokens,
            "data/graph/tokens-out-of-range.npz",
            &[
                "tokens-out-of-range.npz: array `x`, element [2, 5] (sample 2, step 5)",
                "the token id 20 is outside the vocabulary",
            ][..],
        ),
        (
            &per_step,
            "data/graph/steps-labels-out-of-range.npz",
            &["steps-labels-out-of-range.npz: array `y`, element [2, 4] (sample 2, step 4)"][..],
        ),
    ] {
        let run = plumb(&["grad", net.to_str().unwrap(), "-d", data]);
        run.assert_code(if needles.is_empty() { 0 } else { 2 });
        for n in needles {
            assert!(
                run.stderr.contains(n),
                "{data}: `{n}` not in {}",
                run.stderr
            );
        }
    }
}

#[test]
fn shapes_pass_on_numpy_written_sequence_weights_and_grad_runs_seeded_on_every_kind() {
    // fixtures/storage/generate.py writes these files with NumPy, each tensor in its declared
    // storage (transposed recurrent and attention weights among them).
    for (net, weights) in [
        ("storage/sequence.toml", "storage/sequence-weights.npz"),
        ("storage/image.toml", "storage/image-weights.npz"),
        ("storage/signal.toml", "storage/signal-weights.npz"),
    ] {
        let run = plumb(&["shapes", net, "-w", weights, "--format", "json"]);
        run.assert_code(0);
        assert_eq!(run.json()["verdict"], "pass", "{net}");
        // Without a data file: a seeded batch, the same loss twice, and another for another seed.
        let loss = |seed: &str| {
            let run = plumb(&[
                "grad", net, "-w", weights, "--seed", seed, "--format", "json",
            ]);
            run.assert_code(0);
            run.json()["loss"].as_f64().unwrap()
        };
        assert_eq!(loss("3"), loss("3"), "{net}");
        assert_ne!(loss("3"), loss("4"), "{net}");
    }
    for net in ["nets/pump-cnn.toml", "nets/pump-sequence.toml"] {
        plumb(&["shapes", net]).assert_code(0);
        let run = plumb(&["grad", net, "--batch", "3", "--format", "json"]);
        run.assert_code(0);
        assert_eq!(run.json()["samples"], 3);
    }
}

/// `shapes` through the binary on sequence weights gone wrong (the NumPy-written file of
/// fixtures/storage, one tensor changed at a time): an lstm weight stored out × in though
/// `storage = "transposed"` is declared, recurrent blocks of the wrong multiple, an attention
/// projection of the wrong width — each named at its tensor with its code, exit 1.
#[test]
fn shapes_names_sequence_weights_gone_wrong_through_the_binary() {
    use plumb_formats::{DType, FileFormat, write_tensors};
    let dir = scratch("sequence-shapes");
    let good = read_tensors(&fixture("storage/sequence-weights.npz")).unwrap();
    let cases: [(&str, Vec<usize>, bool, &str); 3] = [
        ("layer1.input.weight", vec![8, 3], true, "transposed-matrix"),
        ("layer1.recurrent.weight", vec![2, 6], false, "gate-blocks"),
        ("layer2.value.weight", vec![2, 3], false, "attention-width"),
    ];
    for (tensor, shape, transpose, code) in cases {
        let mut file = good.clone();
        let t = file.tensors.iter_mut().find(|t| t.name == tensor).unwrap();
        *t = if transpose {
            t.transposed()
        } else {
            let n = shape.iter().product();
            plumb_formats::Tensor::new(tensor, shape.clone(), vec![0.1; n])
        };
        let path = dir.join(format!("{code}.npz"));
        write_tensors(&path, FileFormat::Npz, &file.tensors, DType::F64).unwrap();
        let run = plumb(&[
            "shapes",
            "storage/sequence.toml",
            "-w",
            path.to_str().unwrap(),
            "--format",
            "json",
        ]);
        run.assert_code(1);
        let v = run.json();
        let named = v["findings"]
            .as_array()
            .unwrap()
            .iter()
            .any(|f| f["code"] == code && f["tensor"] == tensor && f["severity"] == "error");
        assert!(named, "{tensor}: no {code} error in {v}");
    }
}
