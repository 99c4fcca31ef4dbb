//! `plumb demo` end to end: it runs with no files, says its data is invented, and its written files
//! reproduce what it showed when the commands are run on them by hand.

use crate::util;

use util::{plumb, plumb_in, scratch};

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
    assert!(out.contains("not a safety assessment"));
    assert!(out.contains("verdict: PASS"));
}

#[test]
fn written_files_replay_the_demo() {
    let dir = scratch("demo");
    let d = dir.to_str().unwrap();
    let demo = plumb(&["demo", "--write", d, "--format", "json"]);
    demo.assert_code(0);
    let shown = demo.json()["grad"]["loss"].as_f64().unwrap();
    assert_eq!(demo.json()["written"].as_array().unwrap().len(), 5);
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

    // A second --write refuses to replace the files unless forced.
    let again = plumb(&["demo", "--write", d]);
    again.assert_code(2);
    assert!(again.stderr.contains("--force"));
    plumb(&["demo", "--write", d, "--force", "--quiet"]).assert_code(0);
}

#[test]
fn the_demo_is_reproducible_per_seed() {
    let a = plumb(&["demo", "--format", "json", "--seed", "3"]);
    let b = plumb(&["demo", "--format", "json", "--seed", "3"]);
    assert_eq!(a.stdout, b.stdout);
}
