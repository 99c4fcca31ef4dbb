//! `plumb grad` end to end, against the loss and gradient of a second backpropagation written in NumPy
//! (fixtures/generate.py, `forward_backward`, committed as fixtures/expected/).

use crate::util;

use plumb_formats::{DType, FileFormat, read_tensors};
use util::{fixture, plumb, scratch};

fn expected_loss() -> f64 {
    std::fs::read_to_string(fixture("expected/small-loss.txt"))
        .unwrap()
        .trim()
        .parse()
        .unwrap()
}

/// Both are exact up to rounding in f64: 1e-12 relative, against the tensor's largest entry for
/// entries near zero.
fn assert_close(got: &[f64], want: &[f64], what: &str) {
    let scale = want.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    for (i, (g, w)) in got.iter().zip(want).enumerate() {
        assert!(
            (g - w).abs() <= 1e-12 * w.abs().max(1e-6 * scale),
            "{what}[{i}]: {g} vs {w}"
        );
    }
}

/// `plumb grad` of the small network at its fixture weights and data, with `more` arguments.
fn grad_small(more: &[&str]) -> util::Run {
    let args = [
        "grad",
        "nets/small.toml",
        "-w",
        "weights/small-augmented.npz",
        "-d",
        "data/small.csv",
    ];
    plumb(&[&args[..], more].concat())
}

#[test]
fn loss_and_gradient_match_numpy_and_the_file_keeps_the_layout() {
    let dir = scratch("grad");
    let out = dir.join("g.npz");
    let run = grad_small(&["-o", out.to_str().unwrap(), "--format", "json"]);
    run.assert_code(0);
    let json = run.json();
    let loss = json["loss"].as_f64().unwrap();
    assert!(
        (loss - expected_loss()).abs() <= 1e-12 * expected_loss(),
        "{loss}"
    );
    assert_eq!(json["samples"], 8);

    let got = read_tensors(&out).unwrap();
    let want = read_tensors(&fixture("expected/small-grad.npz")).unwrap();
    assert_eq!(got.format, FileFormat::Npz);
    let names: Vec<&str> = got.tensors.iter().map(|t| t.name.as_str()).collect();
    assert_eq!(names, ["layer1", "layer2"]);
    for t in &want.tensors {
        let g = got.get(&t.name).unwrap();
        assert_eq!(g.shape, t.shape);
        assert_eq!(g.dtype, DType::F64);
        assert_close(&g.data, &t.data, &t.name);
    }
    // The per-tensor norm in the report is that of the written gradient.
    let norm1 = want.tensors[0]
        .data
        .iter()
        .map(|v| v * v)
        .sum::<f64>()
        .sqrt();
    let reported = json["tensors"][0]["norm"].as_f64().unwrap();
    assert!((reported - norm1).abs() <= 1e-12 * norm1);
}

#[test]
fn npz_data_gives_the_same_loss_as_csv() {
    let run = plumb(&[
        "grad",
        "nets/small.toml",
        "-w",
        "weights/small-augmented.npz",
        "-d",
        "data/small.npz",
        "--format",
        "json",
    ]);
    run.assert_code(0);
    let loss = run.json()["loss"].as_f64().unwrap();
    assert!((loss - expected_loss()).abs() <= 1e-12 * expected_loss());
}

#[test]
fn split_transposed_gradient_is_written_transposed_to_safetensors() {
    let dir = scratch("grad-st");
    let out = dir.join("g.safetensors");
    plumb(&[
        "grad",
        "nets/small-split-transposed.toml",
        "-w",
        "weights/small-split-transposed.safetensors",
        "-d",
        "data/small.csv",
        "-o",
        out.to_str().unwrap(),
    ])
    .assert_code(0);
    let got = read_tensors(&out).unwrap();
    let want = read_tensors(&fixture("expected/small-grad.npz")).unwrap();
    // layer2 augmented gradient (3 × 6) → weight (5 × 3) = its columns 1.. transposed, bias = column 0.
    let aug = want.get("layer2").unwrap();
    let w = got.get("layer2.weight").unwrap();
    assert_eq!(w.shape, [5, 3]);
    for r in 0..5 {
        for c in 0..3 {
            let a = aug.data[c * 6 + r + 1];
            assert!((w.data[r * 3 + c] - a).abs() <= 1e-12 * a.abs().max(1e-9));
        }
    }
    let b = got.get("layer2.bias").unwrap();
    assert_eq!(b.shape, [3]);
    for c in 0..3 {
        assert!((b.data[c] - aug.data[c * 6]).abs() <= 1e-12 * aug.data[c * 6].abs().max(1e-9));
    }
}

#[test]
fn float32_weights_give_a_float32_gradient_file() {
    let dir = scratch("grad-f32");
    let out = dir.join("g.npz");
    plumb(&[
        "grad",
        "nets/small.toml",
        "-w",
        "weights/small-augmented-f32.npz",
        "-o",
        out.to_str().unwrap(),
    ])
    .assert_code(0);
    let got = read_tensors(&out).unwrap();
    assert!(got.tensors.iter().all(|t| t.dtype == DType::F32));
}

#[test]
fn outputs_never_replace_a_file_unasked_or_an_input() {
    let dir = scratch("grad-keep");
    let out = dir.join("g.npz");
    std::fs::write(&out, b"precious").unwrap();
    let run = plumb(&["grad", "nets/small.toml", "-o", out.to_str().unwrap()]);
    run.assert_code(2);
    assert!(
        run.stderr.contains("exists") && run.stderr.contains("--force"),
        "{}",
        run.stderr
    );
    assert_eq!(std::fs::read(&out).unwrap(), b"precious");
    plumb(&[
        "grad",
        "nets/small.toml",
        "-o",
        out.to_str().unwrap(),
        "--force",
    ])
    .assert_code(0);
    assert!(read_tensors(&out).is_ok());

    let w = dir.join("w.npz");
    std::fs::copy(fixture("weights/small-augmented.npz"), &w).unwrap();
    let before = std::fs::read(&w).unwrap();
    let run = plumb(&[
        "grad",
        "nets/small.toml",
        "-w",
        w.to_str().unwrap(),
        "-o",
        w.to_str().unwrap(),
        "--force",
    ]);
    run.assert_code(2);
    assert!(run.stderr.contains("input"), "{}", run.stderr);
    assert_eq!(std::fs::read(&w).unwrap(), before);
    // No temporary file left behind by any of this.
    let left: Vec<_> = std::fs::read_dir(&dir)
        .unwrap()
        .map(|e| e.unwrap().file_name())
        .collect();
    assert_eq!(left.len(), 2, "{left:?}");
}

#[test]
fn seeded_runs_without_files_are_reproducible() {
    let a = plumb(&["grad", "nets/small.toml", "--seed", "7", "--format", "json"]);
    let b = plumb(&["grad", "nets/small.toml", "--seed", "7", "--format", "json"]);
    let c = plumb(&["grad", "nets/small.toml", "--seed", "8", "--format", "json"]);
    a.assert_code(0);
    assert_eq!(a.stdout, b.stdout);
    assert_ne!(a.json()["loss"], c.json()["loss"]);
    assert_eq!(a.json()["data"]["source"], "synthetic");
    assert_eq!(a.json()["weights"]["scheme"], "glorot-uniform");
}

/// `--precision f32` runs the pass in f32: against the same NumPy backpropagation in f64
/// (fixtures/expected/), each entry within 1e-5 of its tensor's largest — f32 keeps 24 bits
/// (ε ≈ 1.2e-7) and this 4-5-3 network's values pass through a few dozen roundings each — and the
/// loss is an f32 value (computed in f64 it almost never is), written as f32 by default.
#[test]
fn f32_arithmetic_gives_the_gradient_to_f32_accuracy() {
    let dir = scratch("grad-f32-arith");
    let out = dir.join("g.npz");
    let run = grad_small(&[
        "-o",
        out.to_str().unwrap(),
        "--precision",
        "f32",
        "--format",
        "json",
    ]);
    run.assert_code(0);
    let json = run.json();
    assert_eq!(json["precision"], "f32");
    let loss = json["loss"].as_f64().unwrap();
    assert_eq!(f64::from(loss as f32), loss, "the loss is f32's");
    assert!(
        (loss - expected_loss()).abs() <= 1e-6 * expected_loss(),
        "{loss} vs {}",
        expected_loss()
    );
    assert_ne!(loss, expected_loss());
    // The L2 term as the f32 pass added it (an f32 value), the data term the rest; both within
    // f32's rounding of the f64 reference's.
    let reference = grad_small(&["--format", "json"]).json();
    let l2 = json["l2_term"].as_f64().unwrap();
    assert_eq!(f64::from(l2 as f32), l2);
    for term in ["l2_term", "data_loss"] {
        let (a, b) = (
            json[term].as_f64().unwrap(),
            reference[term].as_f64().unwrap(),
        );
        assert!(
            (a - b).abs() <= 1e-6 * expected_loss(),
            "{term}: {a} vs {b}"
        );
    }
    let got = read_tensors(&out).unwrap();
    let want = read_tensors(&fixture("expected/small-grad.npz")).unwrap();
    for t in &want.tensors {
        let g = got.get(&t.name).unwrap();
        assert_eq!(g.dtype, DType::F32);
        let scale = t.data.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        for (i, (a, b)) in g.data.iter().zip(&t.data).enumerate() {
            assert!((a - b).abs() <= 1e-5 * scale, "{}[{i}]: {a} vs {b}", t.name);
        }
    }
    // The default is the f64 reference, and says so.
    let json = plumb(&["grad", "nets/small.toml", "--format", "json"]).json();
    assert_eq!(json["precision"], "f64");
}

/// A weight past f32's largest value (3.4e38, IEEE 754 binary32) cannot be computed in f32: an
/// input error naming the file, the file's tensor and index (the augmented matrix's column 0 is
/// the bias, so the weight's canonical index 3 is the file's 4) and what to do — in `grad` and
/// in `check` alike — not an infinite loss.
#[test]
fn f32_arithmetic_refuses_a_weight_past_f32s_range() {
    use plumb_formats::{Existing, Tensor, write_tensor_file};
    let dir = scratch("grad-f32-range");
    let w = dir.join("w.npz");
    let mut tensors: Vec<Tensor> = read_tensors(&fixture("weights/small-augmented.npz"))
        .unwrap()
        .tensors;
    tensors[1].data[4] = 1e39;
    write_tensor_file(&w, FileFormat::Npz, &tensors, DType::F64, Existing::Keep).unwrap();
    for command in ["grad", "check"] {
        let args = [command, "nets/small.toml", "-w", w.to_str().unwrap()];
        let run = plumb(&[&args[..], &["--precision", "f32"]].concat());
        run.assert_code(2);
        for part in [
            "w.npz",
            "`layer2` index 4",
            "unit 0, input 3",
            "1e39",
            "--precision f64",
        ] {
            assert!(
                run.stderr.contains(part),
                "{command}, {part}: {}",
                run.stderr
            );
        }
        if command == "grad" {
            plumb(&args).assert_code(0);
        }
    }
}

/// A data value past f32's range is named where it is in the file, in `--precision f32`: a CSV
/// file's line and column with its header (the reader skips empty lines, so lines are counted
/// again, here by hand: header on line 1, samples on lines 2, 3, then two empty lines, the value
/// on line 6), an npz array's element as the reader names one, in the file's own axes (channels
/// last as the flag read it). The CSV reader's own errors count lines the same way.
#[test]
fn f32_arithmetic_names_a_data_value_past_f32s_range_where_it_is() {
    use plumb_formats::{Existing, Tensor, write_tensor_file};
    let dir = scratch("grad-f32-data");
    let csv = std::fs::read_to_string(fixture("data/small.csv")).unwrap();
    let lines: Vec<&str> = csv.lines().collect();
    let row = |line: &str, first: &str| {
        let rest = line.split_once(',').unwrap().1;
        format!("{first},{rest}")
    };
    let text = |first: &str| {
        let mut out = vec![lines[0].to_string(), lines[1].into(), lines[2].into()];
        out.extend([String::new(), String::new(), row(lines[3], first)]);
        out.extend(lines[4..].iter().map(|l| l.to_string()));
        out.join("\n") + "\n"
    };
    let big = dir.join("big.csv");
    std::fs::write(&big, text("1e40")).unwrap();
    let run = plumb(&[
        "grad",
        "nets/small.toml",
        "-d",
        big.to_str().unwrap(),
        "--precision",
        "f32",
    ]);
    run.assert_code(2);
    for part in [
        "big.csv: line 6 (sample 3), column 1 `f1`",
        "1e40",
        "--precision f64",
    ] {
        assert!(run.stderr.contains(part), "{part}: {}", run.stderr);
    }
    let bad = dir.join("bad.csv");
    std::fs::write(&bad, text("abc")).unwrap();
    let run = plumb(&["grad", "nets/small.toml", "-d", bad.to_str().unwrap()]);
    run.assert_code(2);
    assert!(run.stderr.contains("line 6, column `f1`"), "{}", run.stderr);
    // A carriage return alone ends a line too (the reader splits records there, as an editor
    // does lines): after the header, "\r\r\n" is two empty lines, the sample line 4 and the
    // bad value line 5; in a file of lone carriage returns, header, sample, an empty line, and
    // the bad value on line 4.
    for (name, rows, line) in [
        (
            "crs.csv",
            format!(
                "{}\n\r\r\n{}\n{}\n",
                lines[0],
                lines[1],
                row(lines[2], "abc")
            ),
            5,
        ),
        (
            "cr.csv",
            format!("{}\r{}\r\r{}\r", lines[0], lines[1], row(lines[2], "abc")),
            4,
        ),
    ] {
        let path = dir.join(name);
        std::fs::write(&path, rows).unwrap();
        let run = plumb(&["grad", "nets/small.toml", "-d", path.to_str().unwrap()]);
        run.assert_code(2);
        let said = format!("line {line}, column `f1`");
        assert!(run.stderr.contains(&said), "{name}: {}", run.stderr);
    }

    // The demo CNN reads [1 channel, 64 positions]; channels last the file is (m, 64, 1).
    let mut x = vec![0.5; 3 * 64];
    x[64 + 5] = 1e39;
    let y: Vec<f64> = (0..9).map(|k| f64::from(k % 4 == 0)).collect();
    let tensors = [
        Tensor {
            name: "x".into(),
            shape: vec![3, 64, 1],
            dtype: DType::F64,
            data: x,
        },
        Tensor {
            name: "y".into(),
            shape: vec![3, 3],
            dtype: DType::F64,
            data: y,
        },
    ];
    let npz = dir.join("d.npz");
    write_tensor_file(&npz, FileFormat::Npz, &tensors, DType::F64, Existing::Keep).unwrap();
    let root = fixture("../examples/pump-cnn.toml");
    let run = plumb(&[
        "grad",
        root.to_str().unwrap(),
        "-d",
        npz.to_str().unwrap(),
        "--channels-last",
        "--precision",
        "f32",
    ]);
    run.assert_code(2);
    let said = "d.npz: array `x`, element [1, 5, 0] (sample 1, position 5, channel 0) holds 1e39";
    assert!(run.stderr.contains(said), "{}", run.stderr);
}
