//! `plumb demo` end to end: it runs with no files, says its data is invented, and its written files
//! reproduce what it showed when the commands are run on them by hand — for the dense example (a),
//! the 1-D CNN (b) and the LSTM (c).

use crate::util;

use serde_json::Value;
use util::{plumb, plumb_in};

/// The conv bugs of (b) and the recurrent bugs of (c), in the order the seed picks them (seed % 4).
const CNN_BUGS: [&str; 4] = [
    "kernel-flipped",
    "channels-swapped",
    "padding-offset",
    "overlap-overwritten",
];
const LSTM_BUGS: [&str; 4] = [
    "state-gradient-dropped",
    "time-truncated",
    "time-overwritten",
    "gates-reordered",
];

/// The codes the diagnosis gave the wrong tensors of a `compare` report (at least one tensor).
fn diagnosed(compare: &Value) -> Vec<String> {
    let wrong: Vec<String> = compare["tensors"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|t| t["verdict"] == "fail")
        .map(|t| {
            t["diagnosis"]["code"]
                .as_str()
                .unwrap_or("none")
                .to_string()
        })
        .collect();
    assert!(!wrong.is_empty(), "no wrong tensor: {compare}");
    wrong
}

#[test]
fn the_demo_runs_from_nothing_and_explains_itself() {
    let run = plumb(&["demo"]);
    run.assert_code(0);
    let out = &run.stdout;
    assert!(
        out.contains("invented"),
        "the demo must say its data is invented"
    );
    assert!(out.contains("transposed-matrix"));
    // Seed 0 plants these in (b) and (c); the report names them and says plumb planted them.
    assert!(out.contains("kernel-flipped"), "{out}");
    assert!(out.contains("state-gradient-dropped"), "{out}");
    assert!(out.contains("planted by plumb"));
    assert!(out.contains("vibration samples"));
    assert!(out.contains("not a safety assessment"));
    assert!(out.contains("verdict: PASS"));
}

#[test]
fn written_files_replay_the_demo() {
    // The shared run's files, copied: the commands below add files, and --force rewrites them.
    let demo = &util::demo::written().run;
    let dir = util::demo::copy_written("demo");
    let d = dir.to_str().unwrap();
    let shown = demo.json()["grad"]["loss"].as_f64().unwrap();
    assert_eq!(demo.json()["written"].as_array().unwrap().len(), 13);
    let readme = std::fs::read_to_string(dir.join("pump-README.txt")).unwrap();
    assert!(readme.contains("invented"));

    plumb_in(&dir, &["shapes", "pump.toml", "-w", "pump-weights.npz"]).assert_code(0);
    let bad = plumb_in(
        &dir,
        &["shapes", "pump.toml", "-w", "pump-weights-transposed.npz"],
    );
    bad.assert_code(1);
    assert!(bad.stdout.contains("transposed-matrix"));
    let grad = plumb_in(
        &dir,
        &[
            "grad",
            "pump.toml",
            "-w",
            "pump-weights.npz",
            "-d",
            "pump-data.csv",
            "--format",
            "json",
        ],
    );
    grad.assert_code(0);
    assert_eq!(
        grad.json()["loss"].as_f64().unwrap(),
        shown,
        "the CSV holds the demo's data exactly"
    );

    // (b) and (c): the same verdicts from the written files, the planted bug named by compare.
    for (key, stem, bug) in [
        ("vibration", "pump-cnn", CNN_BUGS[0]),
        ("hourly", "pump-lstm", LSTM_BUGS[0]),
    ] {
        let shown = &demo.json()[key];
        assert_eq!(shown["verdict"], "pass", "{key}");
        let net = format!("{stem}.toml");
        let w = format!("{stem}-weights.npz");
        let data = format!("{stem}-data.npz");
        let g = format!("{stem}-grad-planted.npz");
        plumb_in(&dir, &["shapes", &net, "-w", &w]).assert_code(0);
        let grad = plumb_in(
            &dir,
            &["grad", &net, "-w", &w, "-d", &data, "--format", "json"],
        );
        grad.assert_code(0);
        assert_eq!(
            grad.json()["loss"].as_f64().unwrap(),
            shown["grad"]["loss"].as_f64().unwrap(),
            "{key}: the .npz holds the demo's data exactly"
        );
        plumb_in(&dir, &["check", &net, "-w", &w, "-d", &data]).assert_code(0);
        let compare = plumb_in(
            &dir,
            &[
                "compare", &net, "-w", &w, "-d", &data, "-g", &g, "--format", "json",
            ],
        );
        compare.assert_code(1);
        assert!(
            diagnosed(&compare.json()).iter().all(|c| c == bug),
            "{key}: {}",
            compare.stdout
        );
        // The reference itself is right on the same files: its own gradient compares clean.
        let right = dir.join(format!("{stem}-grad.npz"));
        plumb_in(
            &dir,
            &[
                "grad",
                &net,
                "-w",
                &w,
                "-d",
                &data,
                "-o",
                right.to_str().unwrap(),
            ],
        )
        .assert_code(0);
        plumb_in(
            &dir,
            &[
                "compare",
                &net,
                "-w",
                &w,
                "-d",
                &data,
                "-g",
                right.to_str().unwrap(),
            ],
        )
        .assert_code(0);
    }
    plumb_in(
        &dir,
        &[
            "audit",
            "pump-lstm.toml",
            "-w",
            "pump-lstm-weights.npz",
            "-d",
            "pump-lstm-data.npz",
        ],
    )
    .assert_code(0);
    for f in ["pump-cnn.toml", "pump-lstm.toml"] {
        let text = std::fs::read_to_string(dir.join(f)).unwrap();
        assert!(text.contains("INVENTED"), "{f} says its data is invented");
    }

    // A second --write refuses to replace the files unless forced.
    let again = plumb(&["demo", "--write", d]);
    again.assert_code(2);
    assert!(again.stderr.contains("--force"));
    plumb(&["demo", "--write", d, "--force", "--quiet"]).assert_code(0);
}

#[test]
fn the_demo_is_reproducible_per_seed() {
    let twice = util::demo::twice();
    twice.first.assert_code(0);
    assert_eq!(twice.first.stdout, twice.second.stdout);
}

// Every seed picks one conv bug for (b) and one recurrent bug for (c); over four seeds each of the
// four is planted, and the diagnosis names it on every wrong tensor (the demo passes only then),
// in the reference engine's planted gradient and in the NumPy example's, probed.
#[test]
fn each_scenario_names_its_planted_bug() {
    for seed in 0..4u64 {
        let run = util::demo::report(seed);
        run.assert_code(0);
        let r = run.json();
        assert_eq!(r["verdict"], "pass", "seed {seed}");
        for (key, bugs) in [("vibration", CNN_BUGS), ("hourly", LSTM_BUGS)] {
            let s = &r[key];
            let code = bugs[seed as usize % 4];
            assert_eq!(s["planted"]["code"], code, "seed {seed}, {key}");
            assert!(
                diagnosed(&s["planted"]["compare"])
                    .iter()
                    .all(|c| c == code),
                "seed {seed}, {key}: {}",
                s["planted"]["compare"]
            );
            // The same bug planted in the hand-written NumPy example, probed: named likewise.
            let probed = &s["probe"];
            assert_eq!(probed["verdict"], "fail", "seed {seed}, {key}");
            let named = diagnosed(probed);
            assert!(
                !named.is_empty() && named.iter().all(|c| c == code),
                "seed {seed}, {key}: {named:?}"
            );
            assert!(s["scenario"].as_str().unwrap().contains("invented"));
            assert_eq!(s["check"]["verdict"], "pass", "seed {seed}, {key}");
            assert_eq!(s["shapes"]["verdict"], "pass", "seed {seed}, {key}");
        }
        let audit = r["hourly"]["audit"]["findings"].as_array().unwrap();
        assert!(
            audit.iter().all(|f| f["severity"] != "error"),
            "seed {seed}: {audit:?}"
        );
        assert!(r["vibration"].get("audit").is_none());
    }
}
