//! Hostile inputs and outputs at the command line (issue 11): edited or damaged shards and
//! baselines, files that are not files, and outputs that would replace what the user owns. Each
//! test is named after what it guards; every refusal is exit 2 naming the file.

use crate::util;

use std::path::{Path, PathBuf};

use serde_json::Value;
use util::{fixture, merge, plumb, refused, scratch, write};

fn mkfifo(path: &Path) {
    let status = std::process::Command::new("mkfifo")
        .arg(path)
        .status()
        .unwrap();
    assert!(status.success());
}

/// Shard k of n of a check on the small network, as JSON.
fn shard(spec: &str) -> Value {
    let run = plumb(&[
        "check",
        "nets/small.toml",
        "--seed",
        "4",
        "--shard",
        spec,
        "--format",
        "json",
        "--quiet",
    ]);
    run.assert_code(0);
    run.json()
}

/// A coordinate whose rel_error is null (NaN or infinite when written) sorts without the panic
/// "comparison function does not correctly implement a total order"; one missing is refused.
#[test]
fn merge_sorts_null_rel_errors_and_refuses_missing_ones() {
    let dir = scratch("merge-null");
    let (mut a, b) = (shard("1/2"), shard("2/2"));
    let coords = a["coordinates"].as_array_mut().unwrap();
    for (i, c) in coords.iter_mut().enumerate() {
        if i % 3 == 0 {
            c["rel_error"] = Value::Null;
        }
    }
    let (fa, fb) = (write(&dir, "a.json", &a), write(&dir, "b.json", &b));
    let run = merge(&[&fa, &fb]);
    assert!(!run.stderr.contains("panicked"), "{}", run.stderr);
    assert!(run.code == 0 || run.code == 1, "{}", run.stderr);
    // An unknown error ranks worst within its status.
    let merged = run.json();
    assert!(
        merged["worst"][0]["rel_error"].is_null(),
        "{}",
        merged["worst"]
    );
    a["coordinates"][1]
        .as_object_mut()
        .unwrap()
        .remove("rel_error");
    let fa = write(&dir, "a-missing.json", &a);
    refused(
        &merge(&[&fa, &fb]),
        &["a-missing.json", "coordinate 2", "rel_error"],
    );
}

/// `/dev/zero`, a FIFO and a directory as a shard: refused at once (no growing read, no hang).
#[test]
fn merge_refuses_what_is_not_a_regular_file() {
    let dir = scratch("merge-special");
    let fifo = dir.join("pipe.json");
    mkfifo(&fifo);
    let good = write(&dir, "a.json", &shard("1/2"));
    for (bad, says) in [
        ("/dev/zero".to_string(), "not a regular file"),
        (fifo.to_str().unwrap().to_string(), "not a regular file"),
        (dir.to_str().unwrap().to_string(), "directory"),
    ] {
        refused(&merge(&[&good, &bad]), &[&bad, says]);
    }
}

/// `--baseline` on a directory, a FIFO or a symbolic-link loop says what it is.
#[test]
fn baseline_that_is_not_a_file_says_what_it_is() {
    let dir = scratch("baseline-special");
    let fifo = dir.join("pipe.json");
    mkfifo(&fifo);
    let looped = dir.join("loop.json");
    std::os::unix::fs::symlink(&looped, &looped).unwrap();
    for (path, says) in [
        (dir.clone(), "directory"),
        (fifo, "not a regular file"),
        (looped, "symbolic links"),
    ] {
        let run = plumb(&[
            "shapes",
            "nets/small.toml",
            "--baseline",
            path.to_str().unwrap(),
        ]);
        refused(&run, &[path.to_str().unwrap(), says]);
        assert!(!run.stderr.contains("no such baseline"), "{}", run.stderr);
    }
}

/// Dropped, repeated and invented coordinates, and a schema_version that is not this plumb's
/// integer, are refused naming the shard that holds them.
#[test]
fn merge_refuses_edited_coordinates_and_schema_versions() {
    let dir = scratch("merge-edited");
    let (a, b) = (shard("1/2"), shard("2/2"));
    let fa = write(&dir, "a.json", &a);
    let edit = |name: &str, f: &dyn Fn(&mut Value)| {
        let mut v = b.clone();
        f(&mut v);
        write(&dir, name, &v)
    };
    let cases: Vec<(String, Vec<&str>)> = vec![
        (
            edit("duplicated.json", &|v| {
                let c = v["coordinates"][0].clone();
                v["coordinates"][1] = c;
            }),
            vec!["duplicated.json", "coordinate 2", "edited"],
        ),
        (
            edit("invented.json", &|v| {
                let c = &mut v["coordinates"][0];
                let k = c["index"].as_u64().unwrap();
                c["index"] = if k == 0 { 1 } else { k - 1 }.into();
            }),
            vec!["invented.json", "coordinate 1", "edited"],
        ),
        (
            // A shard of schema version 1, which located a dense coordinate by an index array
            // and its augmented row and column: refused by its version, not misread.
            edit("v1.json", &|v| {
                v["schema_version"] = 1.into();
                let c = &mut v["coordinates"][0];
                c["index"] = serde_json::json!([0, 3]);
                c["row"] = 0.into();
                c["column"] = 3.into();
            }),
            vec!["v1.json", "`schema_version` is 1", "run the check again"],
        ),
        (
            edit("direction.json", &|v| {
                v["directions"][0]["layer"] = 2.into();
                v["directions"][0]["bias"] = true.into();
            }),
            vec!["direction.json", "direction 1", "edited"],
        ),
        (
            edit("v999.json", &|v| v["schema_version"] = 999.into()),
            vec!["v999.json", "schema_version", "999"],
        ),
        (
            edit("vstring.json", &|v| v["schema_version"] = "1".into()),
            vec!["vstring.json", "schema_version"],
        ),
        (
            edit("vnull.json", &|v| v["schema_version"] = Value::Null),
            vec!["vnull.json", "schema_version"],
        ),
    ];
    for (file, says) in &cases {
        eprintln!("case {file}");
        refused(&merge(&[&fa, file]), says);
    }
    // One coordinate dropped from each shard: the totals still agree with each other, not with
    // the run's sample.
    let drop_last = |v: &Value, name: &str| {
        let mut v = v.clone();
        v["coordinates"].as_array_mut().unwrap().pop();
        write(&dir, name, &v)
    };
    let (da, db) = (drop_last(&a, "da.json"), drop_last(&b, "db.json"));
    refused(&merge(&[&da, &db]), &["da.json", "cut short"]);
    // One shard cut: that one is blamed, whichever order they come in.
    let cut = drop_last(&b, "cut.json");
    refused(&merge(&[&fa, &cut]), &["cut.json", "cut short"]);
    let run = merge(&[&cut, &fa]);
    refused(&run, &["cut.json", "cut short"]);
    assert!(!run.stderr.contains("a.json:"), "{}", run.stderr);
}

/// A repeated or a missing shard names the files given.
#[test]
fn merge_names_the_files_of_a_repeated_or_missing_shard() {
    let dir = scratch("merge-shares");
    let a = write(&dir, "first.json", &shard("1/3"));
    let a2 = write(&dir, "again.json", &shard("1/3"));
    let b = write(&dir, "second.json", &shard("2/3"));
    refused(
        &merge(&[&a, &a2, &b]),
        &["first.json", "again.json", "both shard 1/3"],
    );
    refused(
        &merge(&[&a, &b]),
        &["3/3 missing", "first.json (1/3)", "second.json (2/3)"],
    );
}

/// A baseline whose `network` is null or missing is refused, not a silent skip of the shape
/// check (a 5 → 6 unit change would pass).
#[test]
fn baseline_without_a_network_is_refused() {
    let dir = scratch("baseline-network");
    let b = dir.join("b.json");
    let run = plumb(&[
        "shapes",
        "nets/small.toml",
        "--save-baseline",
        b.to_str().unwrap(),
        "--quiet",
    ]);
    run.assert_code(0);
    let mut base: Value = serde_json::from_str(&std::fs::read_to_string(&b).unwrap()).unwrap();
    for (name, null) in [("null.json", true), ("missing.json", false)] {
        if null {
            base["network"] = Value::Null;
        } else {
            base.as_object_mut().unwrap().remove("network");
        }
        let p = write(&dir, name, &base);
        let run = plumb(&["shapes", "nets/small.toml", "--baseline", &p]);
        refused(&run, &[name, "records no network"]);
    }
}

fn grad_out(dir: &Path, out: &Path, extra: &[&str]) -> util::Run {
    let mut args = vec![
        "grad".to_string(),
        fixture("nets/small.toml").to_str().unwrap().into(),
        "-o".into(),
        out.to_str().unwrap().into(),
        "--quiet".into(),
    ];
    args.extend(extra.iter().map(|s| s.to_string()));
    util::plumb_in(dir, &args.iter().map(String::as_str).collect::<Vec<_>>())
}

/// `-o X.npz --junit X.npz` is an input error before any work, not XML left in X.npz.
#[test]
fn one_path_is_never_two_outputs() {
    let dir = scratch("two-outputs");
    let out = dir.join("g.npz");
    let run = grad_out(&dir, &out, &["--junit", "g.npz"]);
    refused(&run, &["g.npz", "two outputs"]);
    assert!(!out.exists());
    let run = grad_out(&dir, &out, &["--junit", "j.xml", "--html", "./j.xml"]);
    refused(&run, &["j.xml", "two outputs"]);
}

/// A dangling symbolic link exists; a FIFO or device is never replaced, even with --force.
#[test]
fn outputs_replace_only_regular_files() {
    let dir = scratch("outputs-special");
    let link = dir.join("g.npz");
    std::os::unix::fs::symlink(dir.join("nowhere"), &link).unwrap();
    refused(
        &grad_out(&dir, &link, &[]),
        &["g.npz", "exists", "symbolic link"],
    );
    assert!(
        std::fs::symlink_metadata(&link)
            .unwrap()
            .file_type()
            .is_symlink()
    );
    let fifo = dir.join("pipe.npz");
    mkfifo(&fifo);
    refused(
        &grad_out(&dir, &fifo, &["--force"]),
        &["pipe.npz", "not a regular file"],
    );
    let run = plumb(&[
        "shapes",
        "nets/small.toml",
        "--junit",
        "/dev/null",
        "--force",
    ]);
    refused(&run, &["/dev/null", "not a regular file"]);
}

/// A temporary file of a killed run is named in the next run's message.
#[test]
fn leftovers_of_a_killed_run_are_named() {
    let dir = scratch("leftovers");
    let out = dir.join("g.npz");
    let left: PathBuf = dir.join(".g.npz.plumb-tmp-2147483646-3");
    std::fs::write(&left, b"partial").unwrap();
    let run = grad_out(&dir, &out, &[]);
    run.assert_code(0);
    assert!(
        run.stderr.contains(".g.npz.plumb-tmp-2147483646-3") && run.stderr.contains("killed"),
        "{}",
        run.stderr
    );
    assert!(out.exists());
}

/// A parameter named `__metadata__` cannot be written to safetensors (no reader could open it).
#[test]
fn a_parameter_named_metadata_is_refused_for_safetensors() {
    let dir = scratch("metadata-name");
    let net = dir.join("net.toml");
    std::fs::write(
        &net,
        "inputs = 2\nloss = \"mse\"\nlayout = \"augmented\"\n[[layer]]\nunits = 1\nactivation = \"identity\"\nweight = \"__metadata__\"\n",
    )
    .unwrap();
    let out = dir.join("g.safetensors");
    let run = util::plumb_in(
        &dir,
        &["grad", "net.toml", "-o", "g.safetensors", "--quiet"],
    );
    if run.stderr.contains("net.toml") && run.code == 2 {
        // The description itself refused the name: nothing to write either way.
        assert!(!out.exists());
        return;
    }
    refused(&run, &["g.safetensors", "__metadata__", "reserves"]);
    assert!(!out.exists());
}
