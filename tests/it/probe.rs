//! `plumb probe` end to end against the example programs (examples/python/pump_numpy.py, a
//! hand-written NumPy backprop of the invented pump classifier, and examples/c/pump.c), with each
//! catalogued mistake planted through their `--plant` switch. Needs python3 with NumPy (installed by
//! .ci/run) and a C compiler.

use crate::util;

use std::path::{Path, PathBuf};
use std::sync::OnceLock;
use std::time::Instant;

use util::{plumb_in, scratch};

fn repo() -> &'static Path {
    Path::new(env!("CARGO_MANIFEST_DIR"))
}

/// The demo's files (weights trained on the invented data), shared with the other tests.
fn demo() -> &'static PathBuf {
    static NUMPY: OnceLock<()> = OnceLock::new();
    NUMPY.get_or_init(|| {
        let ok = std::process::Command::new("python3")
            .args(["-c", "import numpy"])
            .status()
            .is_ok_and(|s| s.success());
        assert!(
            ok,
            "these tests need python3 with NumPy: pip install numpy (see .ci/run)"
        );
    });
    &util::demo::written().dir
}

fn probe(extra: &[&str], program: &[&str]) -> util::Run {
    let d = demo();
    let w = d.join("pump-weights.npz");
    let data = d.join("pump-data.csv");
    let net = repo().join("examples/pump.toml");
    let mut args = vec![
        "probe",
        net.to_str().unwrap(),
        "-w",
        w.to_str().unwrap(),
        "-d",
        data.to_str().unwrap(),
        "--quiet",
        "--format",
        "json",
    ];
    args.extend_from_slice(extra);
    args.push("--");
    args.extend_from_slice(program);
    plumb_in(repo(), &args)
}

fn numpy(extra: &[&str]) -> Vec<String> {
    let mut v = vec![
        "python3".to_string(),
        "examples/python/pump_numpy.py".to_string(),
    ];
    v.extend(extra.iter().map(|s| s.to_string()));
    v
}

fn diagnoses(j: &serde_json::Value) -> Vec<Option<String>> {
    j["tensors"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| t["diagnosis"]["code"].as_str().map(String::from))
        .collect()
}

#[test]
fn every_planted_mistake_is_named_through_the_protocol() {
    // (plant, expected code per tensor of the 4-8-6-3 pump network). Hidden-layer mistakes at k
    // change layers 1..k (docs/mistakes.md).
    let all = |c: &str| vec![Some(c.to_string()); 3];
    let upto = |c: &str, k: usize| {
        (0..3)
            .map(|i| (i < k).then(|| c.to_string()))
            .collect::<Vec<_>>()
    };
    let cases: Vec<(&str, Vec<Option<String>>)> = vec![
        ("sign-flipped", all("sign-flipped")),
        ("missing-batch-mean", all("missing-batch-mean")),
        ("double-batch-mean", all("double-batch-mean")),
        ("constant-factor", all("constant-factor")),
        ("bias-regularized", all("bias-regularized")),
        ("regularization-missing", all("regularization-missing")),
        ("regularization-unscaled", all("regularization-unscaled")),
        ("output-delta-mismatch", all("output-delta-mismatch")),
        ("transposed", all("transposed")),
        ("bias-gradient-missing", all("bias-gradient-missing")),
        ("partial-batch", all("partial-batch")),
        (
            "activation-derivative-missing:1",
            upto("activation-derivative-missing", 1),
        ),
        (
            "activation-derivative-missing:2",
            upto("activation-derivative-missing", 2),
        ),
        ("derivative-at-output:1", upto("derivative-at-output", 1)),
        ("derivative-at-output:2", upto("derivative-at-output", 2)),
        ("bias-rows-shifted:1", upto("bias-rows-shifted", 1)),
        ("bias-rows-shifted:2", upto("bias-rows-shifted", 2)),
        ("layers-swapped", upto("layers-swapped", 2)),
        (
            "sign-flipped:2",
            vec![None, Some("sign-flipped".into()), None],
        ),
        (
            "missing-batch-mean:3",
            vec![None, None, Some("missing-batch-mean".into())],
        ),
    ];
    for (plant, want) in cases {
        let prog = numpy(&["--plant", plant]);
        let prog: Vec<&str> = prog.iter().map(String::as_str).collect();
        let run = probe(&[], &prog);
        run.assert_code(1);
        let j = run.json();
        assert_eq!(diagnoses(&j), want, "{plant}: {:#}", j["tensors"]);
        // The gradient is also inconsistent with the program's own (right) loss where it is wrong.
        for (t, w) in j["self_check"]["tensors"]
            .as_array()
            .unwrap()
            .iter()
            .zip(&want)
        {
            assert_eq!(
                t["verdict"] == "fail",
                w.is_some(),
                "{plant}: self-check of {}",
                t["name"]
            );
        }
        assert_eq!(
            j["loss"]["matches"], true,
            "{plant}: the loss itself is right"
        );
    }
}

#[test]
fn a_correct_program_passes_in_f64_f32_and_with_relu() {
    for extra in [vec![], vec!["--dtype", "f32"]] {
        let prog = numpy(&extra);
        let prog: Vec<&str> = prog.iter().map(String::as_str).collect();
        let run = probe(&[], &prog);
        let j = run.json();
        run.assert_code(0);
        // On the demo's trained weights f32 round-off leaves much of the self-check unsettled; it
        // says so and what would settle it, and the verdict rests on the comparison with the
        // reference, which the program's loss and gradient pass.
        if !extra.is_empty() {
            assert_eq!(j["self_check"]["conclusive"], false);
            let f = j["findings"].as_array().unwrap();
            let why = f.iter().find(|f| f["code"] == "inconclusive").unwrap();
            let text = why["message"].as_str().unwrap();
            assert!(text.contains("float64"), "{why}");
            assert!(text.contains("rests on the comparison with the reference"));
            assert_eq!(why["severity"], "note");
        }
        assert_eq!(
            j["program"]["dtype"],
            if extra.is_empty() { "f64" } else { "f32" }
        );
        assert!(
            j["findings"]
                .as_array()
                .unwrap()
                .iter()
                .all(|f| f["severity"] != "error"),
            "{:#}",
            j["findings"]
        );
    }
    let net = repo().join("examples/pump-relu.toml");
    let run = plumb_in(
        repo(),
        &[
            "probe",
            net.to_str().unwrap(),
            "--quiet",
            "--",
            "python3",
            "examples/python/pump_numpy.py",
            "--hidden",
            "relu",
        ],
    );
    run.assert_code(0);
}

/// No false alarm over 20 seeds: seeded weights and synthetic data, each a fresh program.
#[test]
fn no_false_alarm_over_20_seeds() {
    let net = repo().join("examples/pump.toml");
    for seed in 0..20 {
        let s = seed.to_string();
        let run = plumb_in(
            repo(),
            &[
                "probe",
                net.to_str().unwrap(),
                "--seed",
                &s,
                "--quiet",
                "--",
                "python3",
                "examples/python/pump_numpy.py",
            ],
        );
        assert_eq!(run.code, 0, "seed {seed}: {}", run.stdout);
    }
}

#[test]
fn the_c_program_speaks_the_protocol_too() {
    let built = std::process::Command::new("make")
        .args(["-s", "-C", "examples/c"])
        .current_dir(repo())
        .status();
    assert!(
        built.is_ok_and(|s| s.success()),
        "make -C examples/c failed"
    );
    let run = probe(&[], &["examples/c/pump"]);
    run.assert_code(0);
    let run = probe(
        &[],
        &[
            "examples/c/pump",
            "--plant",
            "activation-derivative-missing:2",
        ],
    );
    run.assert_code(1);
    let want: Vec<Option<String>> = vec![
        Some("activation-derivative-missing".into()),
        Some("activation-derivative-missing".into()),
        None,
    ];
    assert_eq!(diagnoses(&run.json()), want);
}

#[test]
fn a_black_box_is_checked_against_its_own_loss_only() {
    let prog = numpy(&[]);
    let prog: Vec<&str> = prog.iter().map(String::as_str).collect();
    let run = probe(&["--blackbox"], &prog);
    run.assert_code(0);
    let j = run.json();
    assert_eq!(j["blackbox"], true);
    assert!(j["tensors"].as_array().unwrap().is_empty() && j["loss"].is_null());
    let prog = numpy(&["--plant", "missing-batch-mean"]);
    let prog: Vec<&str> = prog.iter().map(String::as_str).collect();
    let run = probe(&["--blackbox"], &prog);
    run.assert_code(1);
    assert_eq!(run.json()["findings"][0]["code"], "self-inconsistent");
}

/// Each failing program gives exit 2 and a message saying what happened, within the timeout.
#[test]
fn broken_programs_exit_2_with_the_reason() {
    for (fail, needle) in [
        ("crash", "exited with status 3"),
        ("hang", "did not answer the gradient request within 4 s"),
        ("garbage", "not a protocol message"),
        ("shape", "with shape (7, 5), but declared (8, 5)"),
        ("nan", "not finite (NaN) at [2, 3] of `layer2`"),
        ("version", "protocol version 99"),
    ] {
        let prog = numpy(&["--fail", fail]);
        let prog: Vec<&str> = prog.iter().map(String::as_str).collect();
        // Python with NumPy can take seconds to start on a loaded machine: only the hang waits
        // for the timeout, so a generous one costs nothing elsewhere.
        let timeout = if fail == "hang" { "4" } else { "10" };
        let start = Instant::now();
        let run = probe(&["--timeout", timeout], &prog);
        run.assert_code(2);
        assert!(run.stderr.contains(needle), "{fail}: {}", run.stderr);
        assert!(
            start.elapsed().as_secs_f64() < 20.0,
            "{fail} took {:?}",
            start.elapsed()
        );
    }
    let run = probe(&[], &["/nonexistent/program"]);
    run.assert_code(2);
    assert!(run.stderr.contains("cannot start"), "{}", run.stderr);
    let run = probe(
        &["--method", "complex-step"],
        &["python3", "examples/python/pump_numpy.py"],
    );
    run.assert_code(2);
    assert!(run.stderr.contains("complex numbers"), "{}", run.stderr);
}

/// The JSON report of probe, pinned: top-level and self-check fields exactly as docs/json.md lists.
#[test]
fn probe_report_schema() {
    use std::collections::BTreeSet;
    let prog = numpy(&["--plant", "constant-factor"]);
    let prog: Vec<&str> = prog.iter().map(String::as_str).collect();
    let run = probe(&[], &prog);
    assert!(
        run.stdout
            .trim_start()
            .trim_start_matches('{')
            .trim_start()
            .starts_with("\"verdict\"")
    );
    let j = run.json();
    let keys = |v: &serde_json::Value| {
        v.as_object()
            .unwrap()
            .keys()
            .cloned()
            .collect::<BTreeSet<String>>()
    };
    let set = |k: &[&str]| {
        k.iter()
            .map(|s| s.to_string())
            .collect::<BTreeSet<String>>()
    };
    assert_eq!(
        keys(&j),
        set(&[
            "verdict",
            "schema_version",
            "command",
            "program",
            "blackbox",
            "description",
            "weights",
            "data",
            "self_check",
            "loss",
            "reference",
            "tensors",
            "findings"
        ])
    );
    assert_eq!(keys(&j["program"]), set(&["command", "name", "dtype"]));
    assert_eq!(
        keys(&j["self_check"]),
        set(&[
            "method",
            "step_rule",
            "tolerance",
            "sample",
            "checked",
            "parameters",
            "directions_per_tensor",
            "conclusive",
            "tensors"
        ])
    );
    assert_eq!(
        keys(&j["self_check"]["tensors"][0]),
        set(&[
            "name",
            "verdict",
            "parameters",
            "checked",
            "max_rel_error",
            "median_rel_error",
            "mismatches",
            "unreliable",
            "unsettled",
            "directions",
            "direction_mismatches",
            "worst"
        ])
    );
    let t = &j["tensors"][0];
    assert_eq!(t["diagnosis"]["code"], "constant-factor");
    assert!((t["diagnosis"]["factor"].as_f64().unwrap() - 2.0).abs() < 1e-9);
    assert_eq!(
        keys(t),
        set(&[
            "name",
            "layer",
            "verdict",
            "expected_shape",
            "found_shape",
            "max_rel_error",
            "median_rel_error",
            "cosine",
            "scale",
            "worst",
            "diagnosis"
        ])
    );
}

/// ReLU programs in f32 over 20 seeds: no false alarm, directions included (regression: review
/// found 8 of 20 seeds failing when directions ignored kinks).
#[test]
fn relu_programs_in_f32_raise_no_false_alarm_over_20_seeds() {
    let net = repo().join("examples/pump-relu.toml");
    let mut inconclusive = 0;
    for seed in 0..20 {
        let s = seed.to_string();
        let run = plumb_in(
            repo(),
            &[
                "probe",
                net.to_str().unwrap(),
                "--seed",
                &s,
                "--init",
                "he-normal",
                "--quiet",
                "--",
                "python3",
                "examples/python/pump_numpy.py",
                "--hidden",
                "relu",
                "--dtype",
                "f32",
            ],
        );
        // Never a false alarm; where f32 leaves too much unsettled, inconclusive (exit 1).
        let open = run.stdout.contains("verdict: INCONCLUSIVE");
        assert!(
            run.code == 0 || (run.code == 1 && open),
            "seed {seed}: {}",
            run.stdout
        );
        inconclusive += usize::from(open);
    }
    // Seeded weights are not trained ones: most of them settle.
    assert!(inconclusive <= 5, "{inconclusive} of 20 inconclusive");
}

/// Programs that misbehave in ways the example cannot: a flood of stderr without newlines and with
/// invalid UTF-8, a reply announcing far more values than asked, a NaN written into the JSON, a
/// declaration too large to hold, a grandchild left behind at a timeout.
#[test]
fn hostile_programs_are_contained() {
    let dir = scratch("hostile");
    let hello = r#"import sys, json, math
req = json.loads(sys.stdin.readline())
def hello(tensors): print(json.dumps({"type":"hello","protocol":1,"dtype":"f64","tensors":tensors}), flush=True)
def load():
    h = json.loads(sys.stdin.buffer.readline())
    n = sum(math.prod(t["shape"]) for t in h["tensors"]) + math.prod(h["x"]["shape"]) + math.prod(h["y"]["shape"])
    sys.stdin.buffer.read(8 * n); print(json.dumps({"type":"ready"}), flush=True); sys.stdin.buffer.readline()
"#;
    let cases = [
        (
            "flood.py",
            "sys.stderr.buffer.write(b'\\xff\\xfe' + b'x' * (4 << 20)); sys.stderr.flush()\nhello([{'name':'layer1','shape':[300000000]}])\nsys.stdin.read()",
            "more than the",
        ),
        (
            "huge.py",
            "hello(req['tensors']); load()\nprint(json.dumps({'type':'gradient','loss':1.0,'tensors':[{'name':'layer1','shape':[134000000]}]}), flush=True); sys.stdin.read()",
            "but the request calls for 115",
        ),
        (
            "nan.py",
            "hello(req['tensors']); load()\nprint(json.dumps({'type':'gradient','loss':float('nan'),'tensors':[]}), flush=True); sys.stdin.read()",
            "NaN or Infinity",
        ),
        (
            "cut.py",
            "hello(req['tensors']); load()\nsys.stdout.write('{\"type\": \"gradi'); sys.stdout.flush()",
            "in the middle of its reply",
        ),
    ];
    for (name, body, needle) in cases {
        let path = dir.join(name);
        std::fs::write(&path, format!("{hello}{body}\n")).unwrap();
        let run = probe(&["--timeout", "5"], &["python3", path.to_str().unwrap()]);
        run.assert_code(2);
        assert!(run.stderr.contains(needle), "{name}: {}", run.stderr);
    }
    // A timeout stops the whole process group, not only the program itself.
    let pidfile = dir.join("gc.pid");
    let script = dir.join("grandchild.sh");
    std::fs::write(
        &script,
        format!(
            "#!/bin/sh\npython3 -c 'import time; time.sleep(1000)' &\necho $! > {}\nwait\n",
            pidfile.display()
        ),
    )
    .unwrap();
    let run = probe(&["--timeout", "1"], &["sh", script.to_str().unwrap()]);
    run.assert_code(2);
    std::thread::sleep(std::time::Duration::from_millis(300));
    let pid = std::fs::read_to_string(&pidfile)
        .unwrap()
        .trim()
        .to_string();
    let stat = std::fs::read_to_string(format!("/proc/{pid}/stat")).unwrap_or_default();
    // Gone, or a zombie waiting to be reaped: not running.
    assert!(
        stat.is_empty() || stat.split_whitespace().nth(2) == Some("Z"),
        "grandchild still running: {stat}"
    );
}

/// A program written under `reduction = "sum"` passes against a description that declares it, in
/// all three checks; the same program averaging (the default) is named `double-batch-mean`
/// against that description — the diagnosis names departures from the declared convention.
#[test]
fn a_declared_reduction_is_the_reference_through_the_protocol() {
    let dir = scratch("probe-sum");
    let text = std::fs::read_to_string(repo().join("examples/pump.toml")).unwrap();
    let net = dir.join("pump-sum.toml");
    std::fs::write(&net, format!("reduction = \"sum\"\n{text}")).unwrap();
    let d = demo();
    let (w, data) = (d.join("pump-weights.npz"), d.join("pump-data.csv"));
    let run_with = |program: &[&str]| {
        let mut args = vec![
            "probe",
            net.to_str().unwrap(),
            "-w",
            w.to_str().unwrap(),
            "-d",
            data.to_str().unwrap(),
            "--quiet",
            "--format",
            "json",
            "--",
        ];
        args.extend_from_slice(program);
        plumb_in(repo(), &args)
    };
    let program = numpy(&["--reduction", "sum"]);
    let program: Vec<&str> = program.iter().map(String::as_str).collect();
    let run = run_with(&program);
    run.assert_code(0);
    let j = run.json();
    assert_eq!(j["loss"]["matches"], true);
    assert!(diagnoses(&j).iter().all(Option::is_none));

    let program = numpy(&[]);
    let program: Vec<&str> = program.iter().map(String::as_str).collect();
    let run = run_with(&program);
    run.assert_code(1);
    let j = run.json();
    assert!(
        diagnoses(&j)
            .iter()
            .all(|d| d.as_deref() == Some("double-batch-mean")),
        "{:?}",
        diagnoses(&j)
    );
    assert!(
        j["loss"]["explanation"]
            .as_str()
            .unwrap()
            .contains("averaged over the batch")
    );
}

/// A black box at the user's own weights and data, with no description: the hello names and
/// shapes the tensors (and one sample's x and y), the weight file is read by those names, the data
/// split by those shapes or drawn from them. Both directions, Python and C; and a weight file
/// that does not fit the declaration is refused naming the file and tensor (exit 2). Before, NET
/// was required (clap refused the command line, exit 2).
#[test]
fn a_black_box_runs_at_the_users_weights_without_a_description() {
    let d = demo();
    let w = d.join("pump-weights.npz");
    let data = d.join("pump-data.csv");
    let bb = |extra: &[&str], program: &[&str]| {
        let mut args = vec!["probe", "--blackbox", "-w", w.to_str().unwrap()];
        args.extend_from_slice(extra);
        args.extend_from_slice(&["--quiet", "--format", "json", "--"]);
        args.extend_from_slice(program);
        plumb_in(repo(), &args)
    };
    let py = numpy(&[]);
    let py: Vec<&str> = py.iter().map(String::as_str).collect();
    let run = bb(&["-d", data.to_str().unwrap()], &py);
    run.assert_code(0);
    let j = run.json();
    assert!(j["description"].is_null() && j["blackbox"] == true, "{j:#}");
    assert_eq!(j["weights"]["source"], "file");
    assert_eq!(j["data"]["samples"], 60);
    assert_eq!(j["self_check"]["checked"], 115);
    let planted = numpy(&["--plant", "missing-batch-mean"]);
    let planted: Vec<&str> = planted.iter().map(String::as_str).collect();
    let run = bb(&["-d", data.to_str().unwrap()], &planted);
    run.assert_code(1);
    assert_eq!(run.json()["findings"][0]["code"], "self-inconsistent");

    let built = std::process::Command::new("make")
        .args(["-s", "-C", "examples/c"])
        .current_dir(repo())
        .status();
    assert!(
        built.is_ok_and(|s| s.success()),
        "make -C examples/c failed"
    );
    // No data: a batch drawn from the shapes the C program's hello declares.
    let run = bb(&[], &["examples/c/pump"]);
    run.assert_code(0);
    assert_eq!(run.json()["data"]["source"], "synthetic");
    let run = bb(&[], &["examples/c/pump", "--plant", "sign-flipped"]);
    run.assert_code(1);

    let wrong = d.join("pump-weights-transposed.npz");
    let mut args = vec!["probe", "--blackbox", "-w", wrong.to_str().unwrap(), "--"];
    args.extend_from_slice(&py);
    let run = plumb_in(repo(), &args);
    run.assert_code(2);
    assert!(
        run.stderr.contains("pump-weights-transposed.npz")
            && run.stderr.contains("tensor `layer")
            && run.stderr.contains("the program declares"),
        "{}",
        run.stderr
    );
    // Without --blackbox a description is still required.
    let mut args = vec!["probe", "--"];
    args.extend_from_slice(&py);
    let run = plumb_in(repo(), &args);
    run.assert_code(2);
    assert!(run.stderr.contains("--blackbox"), "{}", run.stderr);
}
