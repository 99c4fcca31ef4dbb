//! `plumb compare` on a graph description (examples/pump-cnn.toml), on gradient files written by
//! the hand-written NumPy backward pass of examples/python/cnn_numpy.py at the parameters and batch
//! of examples/python/reference/cnn.npz (written by autograd, a general-purpose reference). The
//! right program's gradient passes; each planted mistake is named at the tensors it reaches, in
//! float64 and float32 files; and the sequence kinds on gradient files a hand-written NumPy
//! backward pass planted (fixtures/compare/sequence/).

use crate::util;

use std::path::{Path, PathBuf};
use std::process::Command;

use util::{plumb_in, scratch};

fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

const REFERENCE: &str = "examples/python/reference/cnn.npz";

/// The reference's parameters as a weight file and its batch as a data file, in `dir`.
fn inputs(dir: &Path) -> (PathBuf, PathBuf) {
    let (w, d) = (dir.join("w.npz"), dir.join("data.npz"));
    let script = "import numpy as np, sys\n\
        z = np.load(sys.argv[1])\n\
        np.savez(sys.argv[2], **{k[6:]: z[k] for k in z.files if k.startswith('param/')})\n\
        np.savez(sys.argv[3], x=z['x'], y=z['y'])\n";
    let ok = Command::new("python3")
        .args(["-c", script])
        .arg(repo().join(REFERENCE))
        .args([&w, &d])
        .status()
        .expect("python3 runs")
        .success();
    assert!(ok, "writing the weights and data");
    (w, d)
}

/// The gradient the NumPy program computes (with `plant`, if any), written to `out` in `dtype`,
/// its tensors renamed by `rename` (a Python expression in `n`).
fn gradient(out: &Path, plant: Option<&str>, dtype: &str, rename: &str) -> PathBuf {
    let raw = out.with_extension("raw.npz");
    let mut cmd = Command::new("python3");
    cmd.current_dir(repo())
        .args(["examples/python/cnn_numpy.py", "--self-check", REFERENCE])
        .arg("--save")
        .arg(&raw);
    if let Some(p) = plant {
        cmd.args(["--plant", p]);
    }
    let status = cmd.output().expect("python3 runs").status.code();
    assert_eq!(status, Some(if plant.is_some() { 1 } else { 0 }));
    let script = format!(
        "import numpy as np, sys\n\
         z = np.load(sys.argv[1])\n\
         np.savez(sys.argv[2], **{{({rename}): z[n].astype('{dtype}') for n in z.files}})\n"
    );
    let ok = Command::new("python3")
        .args(["-c", &script])
        .args([&raw, out])
        .status()
        .expect("python3 runs")
        .success();
    assert!(ok);
    out.to_path_buf()
}

fn compare(w: &Path, d: &Path, g: &Path) -> util::Run {
    compare_on(&repo().join("examples/pump-cnn.toml"), w, d, g)
}

/// `plumb compare NET -w W -d D -g G`, JSON.
fn compare_on(net: &Path, w: &Path, d: &Path, g: &Path) -> util::Run {
    let s = |p: &Path| p.to_str().unwrap().to_string();
    let args = [
        "compare".to_string(),
        s(net),
        "-w".into(),
        s(w),
        "-d".into(),
        s(d),
        "-g".into(),
        s(g),
        "--format".into(),
        "json".into(),
        "--quiet".into(),
    ];
    let args: Vec<&str> = args.iter().map(String::as_str).collect();
    plumb_in(&repo(), &args)
}

/// Each tensor's diagnosis code (None when it passes).
fn codes(j: &serde_json::Value) -> Vec<(String, Option<String>)> {
    j["tensors"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| {
            let name = t["name"].as_str().unwrap().to_string();
            let pass = t["verdict"] == "pass";
            assert_eq!(pass, t["diagnosis"].is_null(), "{t:#}");
            (name, t["diagnosis"]["code"].as_str().map(String::from))
        })
        .collect()
}

#[test]
fn the_hand_written_gradient_passes_in_f64_and_f32() {
    let dir = scratch("graph-compare-right");
    let (w, d) = inputs(&dir);
    for (dtype, precision) in [("float64", "f64"), ("float32", "f32")] {
        let g = gradient(&dir.join(format!("{dtype}.npz")), None, dtype, "n");
        let run = compare(&w, &d, &g);
        run.assert_code(0);
        let j = run.json();
        assert_eq!(j["precision"], precision);
        assert_eq!(j["reference"]["certified"], true);
        let all = codes(&j);
        assert_eq!(all.len(), 10, "every tensor of pump-cnn.toml is judged");
        assert!(all.iter().all(|(_, c)| c.is_none()), "{all:?}");
        // The worst place is said in the layer's terms.
        let conv = &j["tensors"][0];
        assert_eq!(conv["layer"], 1);
        assert!(
            conv["worst"]["at"]
                .as_str()
                .unwrap()
                .starts_with("out-channel")
        );
    }
}

#[test]
fn names_by_habit_are_matched() {
    let dir = scratch("graph-compare-habit");
    let (w, d) = inputs(&dir);
    let g = gradient(&dir.join("d.npz"), None, "float64", "'d' + n");
    let run = compare(&w, &d, &g);
    run.assert_code(0);
    let j = run.json();
    let names = j["names"].as_array().unwrap();
    assert_eq!(names.len(), 10);
    assert!(names.iter().all(|n| n["matched"] == "habit"));
    assert_eq!(names[0]["file"], "dconv1.weight");
}

/// The plants of the NumPy program, each with the tensors it reaches (the program's own
/// `--self-check` against autograd says which; tests/it/clients.rs holds the same table).
#[test]
fn each_planted_mistake_is_named_where_it_reaches() {
    let dir = scratch("graph-compare-planted");
    let (w, d) = inputs(&dir);
    let below_conv2 = ["conv1.weight", "conv1.bias"];
    let cases: [(&str, Vec<&str>); 3] = [
        (
            "kernel-flipped:conv2",
            [&below_conv2[..], &["conv2.weight"]].concat(),
        ),
        ("channels-swapped:conv2", vec!["conv2.weight"]),
        ("kernel-flipped:conv1", vec!["conv1.weight"]),
    ];
    for (plant, reach) in cases {
        let code = plant.split(':').next().unwrap();
        for dtype in ["float64", "float32"] {
            let out = dir.join(format!("{}-{dtype}.npz", plant.replace(':', "-")));
            let g = gradient(&out, Some(plant), dtype, "n");
            let run = compare(&w, &d, &g);
            run.assert_code(1);
            for (name, got) in codes(&run.json()) {
                let want = reach.contains(&name.as_str()).then_some(code);
                assert_eq!(got.as_deref(), want, "{plant} {dtype}, {name}");
            }
        }
    }
}

/// An input gradient of the wrong shape is an input error naming the file and the tensor.
#[test]
fn an_input_gradient_of_another_shape_is_refused() {
    let dir = scratch("graph-compare-input");
    let (w, d) = inputs(&dir);
    let g = dir.join("g.npz");
    let ok = Command::new("python3")
        .args([
            "-c",
            "import numpy as np, sys; np.savez(sys.argv[1], input=np.zeros((6, 64)))",
        ])
        .arg(&g)
        .status()
        .unwrap()
        .success();
    assert!(ok);
    let run = compare(&w, &d, &g);
    run.assert_code(2);
    assert!(run.stderr.contains("g.npz"), "{}", run.stderr);
    assert!(run.stderr.contains("`input`"), "{}", run.stderr);
    assert!(run.stderr.contains("(6, 1, 64)"), "{}", run.stderr);
}

/// The sequence kinds' mistakes planted by a NumPy backward pass written by hand apart from the
/// engine (fixtures/compare/sequence/generate.py, invented data): an rnn, a gru with the reset
/// after (every step read) and before (the last state read), token ids through an embedding into
/// attention without a mask. The lstm's and the causal attention's plants are the examples' own
/// (tests/it/clients.rs). Each file in float64 and float32 (computed in float32 end to end): the
/// right gradient passes; each plant is named at exactly the tensors the generator found it
/// changes (the input gradient among them), or by a mistake it found giving the same gradient.
#[test]
fn each_sequence_mistake_planted_in_numpy_is_named_where_it_reaches() {
    let dir = repo().join("fixtures/compare/sequence");
    let text = std::fs::read_to_string(dir.join("expected.json")).unwrap();
    let expected: serde_json::Value = serde_json::from_str(&text).unwrap();
    let networks = expected["networks"].as_object().unwrap();
    assert_eq!(networks.len(), 4);
    let strings = |v: &serde_json::Value| -> Vec<String> {
        v.as_array()
            .unwrap()
            .iter()
            .map(|s| s.as_str().unwrap().to_string())
            .collect()
    };
    let mut named = std::collections::BTreeSet::new();
    for (net, e) in networks {
        let tensors = strings(&e["tensors"]);
        let mut plants = vec![("correct".to_string(), vec![], vec![])];
        for (code, p) in e["plants"].as_object().unwrap() {
            plants.push((code.clone(), strings(&p["reach"]), strings(&p["alike"])));
        }
        for (plant, reach, alike) in &plants {
            for dtype in ["f64", "f32"] {
                let file = |what: &str| dir.join(format!("{net}-{what}"));
                let run = compare_on(
                    &dir.join(format!("{net}.toml")),
                    &file("weights.npz"),
                    &file("data.npz"),
                    &file(&format!("{plant}-{dtype}.npz")),
                );
                let what = format!("{net} {plant} {dtype}");
                run.assert_code(if reach.is_empty() { 0 } else { 1 });
                let j = run.json();
                assert_eq!(j["precision"], dtype, "{what}");
                let got = codes(&j);
                let judged: Vec<&str> = got.iter().map(|(n, _)| n.as_str()).collect();
                assert_eq!(judged, tensors, "{what}: every tensor judged");
                for ((name, code), t) in got.into_iter().zip(j["tensors"].as_array().unwrap()) {
                    if !reach.contains(&name) {
                        assert_eq!(code, None, "{what}: {name}");
                        continue;
                    }
                    // The code named and the ones listed alike with it are the plant and the
                    // codes the generator found giving the same gradient, in some order.
                    let mut said = vec![code.unwrap_or_default()];
                    if let Some(a) = t["diagnosis"].get("alike") {
                        said.extend(strings(a));
                    }
                    said.sort();
                    let mut want = [&[plant.clone()][..], alike].concat();
                    want.sort();
                    assert_eq!(said, want, "{what}: {name}");
                    named.insert(plant.clone());
                }
            }
        }
    }
    // Every code of these kinds that can show without a causal mask (the lstm's are the same
    // recurrent core's, planted in examples/python/lstm_numpy.py).
    let all = [
        "time-truncated",
        "state-gradient-dropped",
        "time-overwritten",
        "gates-reordered",
        "attention-scale-missing",
        "softmax-jacobian-diagonal",
        "embedding-rows-overwritten",
    ];
    assert_eq!(named, all.iter().map(|c| c.to_string()).collect());
}

/// A baseline of a sequence network's right gradient: the right file passes against it; a
/// planted one (gates-reordered in the gru) fails it at the gru's tensors only, and its JUnit
/// report has a failing case per such tensor.
#[test]
fn a_sequence_baseline_and_junit_name_the_regressed_tensors() {
    let dir = repo().join("fixtures/compare/sequence");
    let out = scratch("graph-compare-baseline");
    let baseline = out.join("baseline.json");
    let junit = out.join("junit.xml");
    let file = |what: &str| dir.join(format!("gru-after-all-{what}"));
    let s = |p: &Path| p.to_str().unwrap().to_string();
    let run = |g: &str, extra: &[String]| {
        let mut args = vec![
            "compare".to_string(),
            s(&dir.join("gru-after-all.toml")),
            "-w".into(),
            s(&file("weights.npz")),
            "-d".into(),
            s(&file("data.npz")),
            "-g".into(),
            s(&file(g)),
            "--format".into(),
            "json".into(),
            "--quiet".into(),
        ];
        args.extend(extra.iter().cloned());
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        plumb_in(&repo(), &args)
    };
    run("correct-f64.npz", &["--save-baseline".into(), s(&baseline)]).assert_code(0);
    let own = run("correct-f64.npz", &["--baseline".into(), s(&baseline)]);
    own.assert_code(0);
    assert_eq!(own.json()["baseline"]["worse"], 0, "{}", own.stdout);
    let planted = run(
        "gates-reordered-f64.npz",
        &[
            "--baseline".into(),
            s(&baseline),
            "--junit".into(),
            s(&junit),
        ],
    );
    planted.assert_code(1);
    let j = planted.json();
    let regressed: Vec<&str> = j["findings"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|f| f["code"].as_str().unwrap().starts_with("baseline-"))
        .filter_map(|f| f["tensor"].as_str())
        .collect();
    assert!(!regressed.is_empty(), "{:#}", j["findings"]);
    assert!(
        regressed.iter().all(|t| t.starts_with("gru.")),
        "{regressed:?}"
    );
    let xml = std::fs::read_to_string(&junit).unwrap();
    for t in [
        "gru.input.weight",
        "gru.recurrent.weight",
        "gru.input.bias",
        "gru.recurrent.bias",
    ] {
        assert!(xml.contains(t), "{t} not in {xml}");
    }
    assert!(xml.contains("gates-reordered"), "{xml}");
    assert!(xml.contains("<failure"), "{xml}");
}
