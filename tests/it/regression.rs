//! Regression tests, each named after what it guards (found in review of the first version).

use crate::util;

use util::{fixture, plumb, plumb_in, scratch};

#[test]
fn a_npy_gradient_plumb_wrote_reads_back_as_weights() {
    let dir = scratch("npy-back");
    std::fs::write(
        dir.join("one.toml"),
        "inputs = 3\nloss = \"squared-error\"\n[[layer]]\nunits = 2\nactivation = \"identity\"\n",
    )
    .unwrap();
    plumb_in(&dir, &["grad", "one.toml", "-o", "g1.npy"]).assert_code(0);
    plumb_in(&dir, &["shapes", "one.toml", "-w", "g1.npy"]).assert_code(0);
    plumb_in(&dir, &["grad", "one.toml", "-w", "g1.npy"]).assert_code(0);
}

#[test]
fn missing_bias_columns_everywhere_are_not_called_a_layer_swap() {
    let run = plumb(&[
        "shapes",
        "nets/five-four-four.toml",
        "-w",
        "weights/mistakes/bias-missing-everywhere.npz",
        "--format",
        "json",
    ]);
    run.assert_code(1);
    let j = run.json();
    let codes: Vec<&str> = j["findings"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| f["code"].as_str().unwrap())
        .collect();
    assert_eq!(
        codes
            .iter()
            .filter(|c| **c == "bias-column-missing")
            .count(),
        2,
        "{codes:?}"
    );
    assert!(!codes.contains(&"layers-out-of-order"), "{codes:?}");
}

#[test]
fn one_tensor_name_for_two_layers_is_refused() {
    let dir = scratch("dup-names");
    std::fs::write(
        dir.join("dup.toml"),
        "inputs = 2\nloss = \"squared-error\"\nlayout = \"split\"\n[[layer]]\nunits = 2\nactivation = \"tanh\"\nweight = \"w\"\n[[layer]]\nunits = 1\nactivation = \"identity\"\nweight = \"w\"\n",
    )
    .unwrap();
    let run = plumb_in(&dir, &["shapes", "dup.toml"]);
    run.assert_code(2);
    assert!(
        run.stderr.contains("dup.toml:8") && run.stderr.contains("`w` is used twice"),
        "{}",
        run.stderr
    );
}

#[test]
fn cross_entropy_targets_outside_zero_to_one_are_refused() {
    let dir = scratch("ce-targets");
    std::fs::write(
        dir.join("d.csv"),
        "f1,f2,f3,f4,t1,t2,t3\n0,0,0,0,0,1,0\n1,2,3,4,0,5,1\n",
    )
    .unwrap();
    let d = dir.join("d.csv");
    let run = plumb(&["grad", "nets/small.toml", "-d", d.to_str().unwrap()]);
    run.assert_code(2);
    assert!(
        run.stderr.contains("line 3 (sample 2), column 6 `t2`")
            && run.stderr.contains("outside [0, 1]"),
        "{}",
        run.stderr
    );
}

#[test]
fn non_finite_weights_are_located_and_refused() {
    // A 5 × 5 float64 NPY written here byte by byte (the NPY 1.0 layout: magic, version, header
    // length, header padded to 64 bytes), entry 7 — row 1, column 2 — a NaN.
    let dir = scratch("nan");
    let file = dir.join("nan.npy");
    let mut bytes = Vec::new();
    bytes.extend_from_slice(b"\x93NUMPY\x01\x00");
    let header = "{'descr': '<f8', 'fortran_order': False, 'shape': (5, 5), }";
    let mut h = header.to_string();
    while !(10 + h.len() + 1).is_multiple_of(64) {
        h.push(' ');
    }
    h.push('\n');
    bytes.extend_from_slice(&(h.len() as u16).to_le_bytes());
    bytes.extend_from_slice(h.as_bytes());
    for k in 0..25 {
        let v = if k == 7 { f64::NAN } else { 0.1 * k as f64 };
        bytes.extend_from_slice(&v.to_le_bytes());
    }
    std::fs::write(&file, bytes).unwrap();
    std::fs::write(
        dir.join("one.toml"),
        "inputs = 4\nloss = \"squared-error\"\n[[layer]]\nunits = 5\nactivation = \"tanh\"\n",
    )
    .unwrap();
    let run = plumb_in(&dir, &["grad", "one.toml", "-w", "nan.npy"]);
    run.assert_code(2);
    assert!(run.stderr.contains("holds NaN at [1, 2]"), "{}", run.stderr);
}

#[test]
fn devices_and_directories_are_never_read() {
    for args in [
        vec!["shapes", "nets/small.toml", "-w", "/dev/zero"],
        vec!["shapes", "/dev/zero"],
        vec!["grad", "nets/small.toml", "-d", "/dev/zero"],
        vec!["shapes", "nets/small.toml", "-w", "weights"],
    ] {
        let run = plumb(&args);
        run.assert_code(2);
        assert!(
            run.stderr.contains("regular file")
                || run.stderr.contains("directory")
                || run.stderr.contains("extension"),
            "{args:?}: {}",
            run.stderr
        );
    }
}

#[test]
fn a_network_too_large_to_hold_is_refused_before_allocating() {
    let dir = scratch("huge");
    std::fs::write(
        dir.join("wide.toml"),
        "inputs = 1\nloss = \"squared-error\"\n[[layer]]\nunits = 30000000\nactivation = \"identity\"\n[[layer]]\nunits = 1\nactivation = \"identity\"\n",
    )
    .unwrap();
    let run = plumb_in(&dir, &["grad", "wide.toml"]);
    run.assert_code(2);
    assert!(run.stderr.contains("wide.toml:7"), "{}", run.stderr);
    std::fs::write(
        dir.join("deep.toml"),
        "inputs = 1\nloss = \"squared-error\"\n[[layer]]\nunits = 3000000\nactivation = \"identity\"\n[[layer]]\nunits = 1\nactivation = \"identity\"\n",
    )
    .unwrap();
    let run = plumb_in(&dir, &["grad", "deep.toml", "--batch", "64"]);
    run.assert_code(2);
    assert!(run.stderr.contains("activation values"), "{}", run.stderr);
}

/// Baselines recorded before the convention keys existed stay valid: the description hash of
/// nets/small.toml is the value the version before them wrote (e71c426d9d660f75, read from that
/// build's `check --format json`), also with the defaults spelled out; a declared convention
/// changes it.
#[test]
fn default_conventions_keep_the_description_hash() {
    let hash_of = |dir: &std::path::Path, net: &str| {
        plumb_in(
            dir,
            &[
                "check",
                net,
                "--sample",
                "3",
                "--directions",
                "0",
                "--format",
                "json",
            ],
        )
        .json()["description_hash"]
            .as_str()
            .unwrap()
            .to_string()
    };
    let fixtures = util::fixture("");
    assert_eq!(hash_of(&fixtures, "nets/small.toml"), "e71c426d9d660f75");
    let dir = scratch("hash");
    let text = std::fs::read_to_string(fixtures.join("nets/small.toml")).unwrap();
    let spelled = format!("reduction = \"mean\"\nl2-divisor = \"2m\"\nl2-on-bias = false\n{text}");
    std::fs::write(dir.join("spelled.toml"), spelled).unwrap();
    assert_eq!(hash_of(&dir, "spelled.toml"), "e71c426d9d660f75");
    std::fs::write(dir.join("sum.toml"), format!("reduction = \"sum\"\n{text}")).unwrap();
    assert_ne!(hash_of(&dir, "sum.toml"), "e71c426d9d660f75");
}

// docs/description.md said 2²⁸ parameters; the binary stops at 2²⁶. A network of exactly 2²⁶
// parameters is accepted as a description, one more is refused, and the docs state that number.
#[test]
fn the_documented_parameter_limit_is_the_enforced_one() {
    let limit: usize = 1 << 26;
    let docs = std::fs::read_to_string(fixture("../docs/description.md")).unwrap();
    assert!(
        docs.contains("2²⁶ = 67,108,864 parameters"),
        "docs/description.md must state the limit"
    );
    assert_eq!(limit, 67_108_864);
    let dir = scratch("limit");
    // One layer of units × (inputs + 1) parameters: 8192 × 8192 = 2²⁶ exactly with 8191 inputs.
    for (inputs, refused) in [(8191, false), (8192, true)] {
        std::fs::write(
            dir.join("n.toml"),
            format!("inputs = {inputs}\nloss = \"squared-error\"\n[[layer]]\nunits = 8192\nactivation = \"identity\"\n"),
        )
        .unwrap();
        // `shapes` without weights only reads the description: no allocation of the network.
        let run = plumb_in(&dir, &["shapes", "n.toml", "--format", "json"]);
        if refused {
            run.assert_code(2);
            assert!(run.stderr.contains(&limit.to_string()), "{}", run.stderr);
        } else {
            run.assert_code(0);
            assert_eq!(run.json()["total_parameters"], limit);
        }
    }
}

// `--batch` with `-d` was ignored without a word: the data file sets the samples, so the two
// together are refused (exit 2) naming both, for every command that reads data.
#[test]
fn batch_with_a_data_file_is_refused_not_ignored() {
    for args in [
        &[
            "grad",
            "nets/small.toml",
            "-d",
            "data/small.csv",
            "--batch",
            "5",
        ][..],
        &[
            "audit",
            "nets/audit.toml",
            "-w",
            "audit/healthy.npz",
            "-d",
            "data/audit.csv",
            "--batch",
            "5",
        ][..],
    ] {
        let run = plumb(args);
        run.assert_code(2);
        assert!(
            run.stderr.contains("--batch") && run.stderr.contains("--data"),
            "{args:?}: {}",
            run.stderr
        );
    }
    plumb(&["grad", "nets/small.toml", "--batch", "5"]).assert_code(0);
}

// `probe --help` offered `--method complex-step` and then refused it; the help no longer lists it,
// `check --help` still does, and asking probe for it still gets the reason.
#[test]
fn probe_help_does_not_offer_the_complex_step() {
    let help = plumb(&["probe", "--help"]);
    help.assert_code(0);
    let method = help
        .stdout
        .split("--method")
        .nth(1)
        .unwrap()
        .split("\n      --")
        .next()
        .unwrap();
    assert!(method.contains("richardson"), "{method}");
    assert!(!method.contains("complex-step"), "{method}");
    assert!(plumb(&["check", "--help"]).stdout.contains("complex-step"));
    let run = plumb(&[
        "probe",
        "nets/small.toml",
        "--method",
        "complex-step",
        "--",
        "true",
    ]);
    run.assert_code(2);
    assert!(run.stderr.contains("complex numbers"), "{}", run.stderr);
}

// The demo's report in the temporary directory was replaced silently by the next run with the same
// seed: it still is replaced (it is the demo's own file, named by its seed), and says so.
#[test]
fn the_demo_says_when_it_replaces_its_earlier_report() {
    let twice = util::demo::twice();
    let (first, second) = (&twice.first, &twice.second);
    first.assert_code(0);
    second.assert_code(0);
    let report = twice.tmp.join(format!(
        "plumb-demo-report-seed{}.html",
        util::demo::TWICE_SEED
    ));
    assert!(report.is_file(), "{}", first.stderr);
    assert!(!first.stderr.contains("replaced"), "{}", first.stderr);
    assert!(second.stderr.contains("replaced"), "{}", second.stderr);
    assert!(
        second.stderr.contains(report.to_str().unwrap()),
        "{}",
        second.stderr
    );
}

// The JUnit failure of a wrong gradient tensor in `compare` has the diagnosis as its type (the
// mistake, not the finding's `gradient-mismatch`); docs/report.md shows this very output.
#[test]
fn the_junit_failure_type_is_what_the_docs_say() {
    let dir = scratch("junit-type");
    let xml = dir.join("j.xml");
    let run = plumb(&[
        "compare",
        "nets/compare.toml",
        "-w",
        "weights/compare.npz",
        "-d",
        "data/compare.csv",
        "-g",
        "compare/sign-flipped-layer2.npz",
        "--junit",
        xml.to_str().unwrap(),
        "--format",
        "json",
    ]);
    run.assert_code(1);
    let code = run.json()["tensors"]
        .as_array()
        .unwrap()
        .iter()
        .find_map(|t| t["diagnosis"]["code"].as_str().map(str::to_string))
        .unwrap();
    let text = std::fs::read_to_string(&xml).unwrap();
    let failure = text
        .lines()
        .find(|l| l.contains("<failure"))
        .unwrap()
        .trim();
    assert!(
        failure.starts_with(&format!("<failure type=\"{code}\"")),
        "{failure}"
    );
    let head = &failure[..failure.find('>').unwrap() + 1];
    let docs = std::fs::read_to_string(fixture("../docs/report.md")).unwrap();
    assert!(docs.contains(head), "docs/report.md should show {head}");
}

// The relative-error plot draws plumb's own figures — the tolerance of the precision and each
// coordinate's error bound — not the widely quoted bands and their labels.
#[test]
fn the_error_plot_shows_the_tolerance_and_the_bounds_not_borrowed_bands() {
    let dir = scratch("strip-words");
    let html = dir.join("r.html");
    plumb(&["check", "nets/small.toml", "--html", html.to_str().unwrap()]).assert_code(0);
    let page = std::fs::read_to_string(&html).unwrap();
    assert!(page.contains("tolerance 1e-6 (f64)"), "no tolerance line");
    assert!(page.contains("the error its finite-difference method can explain"));
    for borrowed in ["suspicious", "almost surely wrong", "good (smooth)"] {
        assert!(!page.contains(borrowed), "{borrowed}");
    }
    let shapes = plumb(&["shapes", "nets/small.toml"]);
    assert!(shapes.stdout.contains("in → out") && !shapes.stdout.contains("s_j"));
}
