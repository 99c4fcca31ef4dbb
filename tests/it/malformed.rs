//! Unusable input end to end: every case exits 2 with a message naming the file and the place
//! (byte, member, line, key, tensor) and never panics. Broken files are in fixtures/malformed/
//! (written by fixtures/generate.py); broken descriptions are written here.

use crate::util;

use util::{fixture, plumb, plumb_in, scratch};

/// Runs and checks: exit 2, no panic, and every `needle` in stderr.
fn refused(args: &[&str], needles: &[&str]) {
    let run = plumb(args);
    run.assert_code(2);
    assert!(!run.stderr.contains("panicked"), "{}", run.stderr);
    assert!(
        run.stdout.is_empty(),
        "nothing on stdout for unusable input: {}",
        run.stdout
    );
    for n in needles {
        assert!(
            run.stderr.contains(n),
            "{args:?}: `{n}` not in: {}",
            run.stderr
        );
    }
}

fn weights(file: &str, needles: &[&str]) {
    let path = format!("malformed/{file}");
    let mut all = vec![file];
    all.extend_from_slice(needles);
    refused(&["shapes", "nets/small.toml", "--weights", &path], &all);
    refused(&["grad", "nets/small.toml", "--weights", &path], &all);
}

fn data(file: &str, needles: &[&str]) {
    let path = format!("malformed/{file}");
    let mut all = vec![file];
    all.extend_from_slice(needles);
    refused(&["grad", "nets/small.toml", "--data", &path], &all);
}

#[test]
fn broken_npy_files() {
    weights("truncated.npy", &["byte 128", "truncated"]);
    weights(
        "header-only.npy",
        &["byte 128", "200 bytes", "0 bytes follow"],
    );
    weights("not-npy.npy", &["byte 0", "not an NPY file"]);
    weights("empty.npy", &["empty"]);
    weights("huge-shape.npy", &["(1000000000000, 1000000000000)"]);
    weights("bad-header.npy", &["`dtype`", "header"]);
    weights("object-dtype.npy", &["'|O'"]);
}

#[test]
fn broken_npz_files() {
    weights("truncated.npz", &["zip"]);
    weights("corrupt.npz", &["member `layer1.npy`"]);
    weights("stray-member.npz", &["member `notes.txt`"]);
}

#[test]
fn broken_safetensors_files() {
    weights("truncated.safetensors", &["safetensors"]);
    weights("header-length.safetensors", &["header"]);
    weights("garbage.safetensors", &["safetensors"]);
    weights(
        "zip-named-safetensors.safetensors",
        &["rename the file to .npz"],
    );
}

#[test]
fn broken_data_files() {
    data("ragged.csv", &["line 3", "4 fields"]);
    data("not-a-number.csv", &["line 3", "`f3`", "three"]);
    data("header-only.csv", &["no samples"]);
    data("empty.csv", &["empty"]);
    data("bad-label.csv", &["line 3", "`label`", "0..=2"]);
    data("wrong-columns.csv", &["line 1", "4 features"]);
    data("data-no-y.npz", &["`y`"]);
}

#[test]
fn weights_that_do_not_fit_cannot_be_used_for_a_gradient() {
    refused(
        &[
            "grad",
            "nets/small.toml",
            "-w",
            "weights/mistakes/transposed.npz",
        ],
        &[
            "transposed.npz",
            "layer2",
            "transposed-matrix",
            "plumb shapes",
        ],
    );
    refused(
        &[
            "grad",
            "nets/small.toml",
            "-w",
            "weights/mistakes/dtype-not-float.npz",
        ],
        &["layer1", "int64"],
    );
}

/// Each broken description, its expected line and words.
#[test]
fn broken_descriptions() {
    let dir = scratch("bad-nets");
    let good = std::fs::read_to_string(fixture("nets/small.toml")).unwrap();
    let cases: Vec<(&str, String, &[&str])> = vec![
        (
            "unknown-key.toml",
            good.replace("units = 3", "unit = 3"),
            &[":11:", "`unit`", "did you mean `units`"],
        ),
        (
            "zero-units.toml",
            good.replace("units = 5", "units = 0"),
            &[":7:", "0 units"],
        ),
        (
            "softmax-hidden.toml",
            good.replace("\"tanh\"", "\"softmax\""),
            &[":8:", "only allowed on the output layer"],
        ),
        (
            "ce-linear.toml",
            good.replace("\"softmax\"", "\"identity\""),
            &[":3:", "cross-entropy needs sigmoid or softmax"],
        ),
        (
            "not-toml.toml",
            good.replace("inputs = 4", "inputs = = 4"),
            &[":2:", "not valid TOML"],
        ),
        (
            "no-layers.toml",
            "inputs = 4\nloss = \"squared-error\"\n".to_string(),
            &["`layer` is missing"],
        ),
        (
            "huge.toml",
            good.replace("units = 5", "units = 100000000"),
            &[":7:", "plumb"],
        ),
        (
            "bad-activation.toml",
            good.replace("\"tanh\"", "\"tahn\""),
            &[":8:", "did you mean `tanh`"],
        ),
    ];
    for (name, text, needles) in cases {
        std::fs::write(dir.join(name), text).unwrap();
        for cmd in ["shapes", "grad"] {
            let run = plumb_in(&dir, &[cmd, name]);
            run.assert_code(2);
            assert!(!run.stderr.contains("panicked"));
            assert!(run.stderr.contains(name), "{name}: {}", run.stderr);
            for n in needles {
                assert!(
                    run.stderr.contains(n),
                    "{name}: `{n}` not in {}",
                    run.stderr
                );
            }
        }
    }
    refused(
        &["shapes", "nets/missing.toml"],
        &["missing.toml", "cannot read"],
    );
}

#[test]
fn bad_flags_and_outputs() {
    refused(&["grad", "nets/small.toml", "--batch", "0"], &["--batch"]);
    refused(
        &["grad", "nets/small.toml", "--batch", "100000000000"],
        &["--batch"],
    );
    refused(
        &["shapes", "nets/small.toml", "-w", "data/small.csv"],
        &["small.csv", ".npz"],
    );
    let dir = scratch("bad-out");
    let out = dir.join("g.txt");
    refused(
        &["grad", "nets/small.toml", "-o", out.to_str().unwrap()],
        &["g.txt", "extension"],
    );
    let npy = dir.join("g.npy");
    refused(
        &["grad", "nets/small.toml", "-o", npy.to_str().unwrap()],
        &["g.npy", "one tensor"],
    );
    assert!(!npy.exists());
    // Usage errors from the parser are exit 2 as well.
    let run = plumb(&["grad"]);
    run.assert_code(2);
    let run = plumb(&["shapes", "nets/small.toml", "--format", "yaml"]);
    run.assert_code(2);
}
