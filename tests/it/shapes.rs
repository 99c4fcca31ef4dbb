//! `plumb shapes` end to end: every shape mistake on a fixture that contains it (written by NumPy,
//! fixtures/generate.py), and correct files in each layout and format.

use crate::util;

use util::plumb;

fn codes(json: &serde_json::Value) -> Vec<(String, Option<String>)> {
    json["findings"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|f| f["severity"] == "error")
        .map(|f| {
            (
                f["code"].as_str().unwrap().to_string(),
                f["tensor"].as_str().map(String::from),
            )
        })
        .collect()
}

fn audit(net: &str, weights: &str) -> (i32, serde_json::Value) {
    let run = plumb(&["shapes", net, "--weights", weights, "--format", "json"]);
    (run.code, run.json())
}

#[test]
fn correct_files_pass_in_every_layout_and_format() {
    for (net, w) in [
        ("nets/small.toml", "weights/small-augmented.npz"),
        ("nets/small.toml", "weights/small-augmented-f32.npz"),
        ("nets/small-split.toml", "weights/small-split.npz"),
        ("nets/small-split.toml", "weights/small-split.safetensors"),
        (
            "nets/small-split-transposed.toml",
            "weights/small-split-transposed.safetensors",
        ),
        ("nets/small-named.toml", "weights/small-named.safetensors"),
    ] {
        let (code, json) = audit(net, w);
        assert_eq!(code, 0, "{net} {w}: {json:#}");
        assert_eq!(json["verdict"], "pass");
        assert_eq!(json["total_parameters"], 43);
        assert!(codes(&json).is_empty());
    }
}

#[test]
fn each_planted_mistake_is_named_at_its_tensor() {
    let cases = [
        (
            "nets/small.toml",
            "transposed.npz",
            "transposed-matrix",
            Some("layer2"),
        ),
        (
            "nets/small.toml",
            "bias-column-missing.npz",
            "bias-column-missing",
            Some("layer1"),
        ),
        (
            "nets/small.toml",
            "layers-out-of-order.npz",
            "layers-out-of-order",
            Some("layer1"),
        ),
        (
            "nets/small.toml",
            "layers-out-of-order.npz",
            "layers-out-of-order",
            Some("layer2"),
        ),
        (
            "nets/small.toml",
            "tensor-missing.npz",
            "tensor-missing",
            Some("layer2"),
        ),
        (
            "nets/small.toml",
            "tensor-unexpected.npz",
            "tensor-unexpected",
            Some("momentum"),
        ),
        (
            "nets/small.toml",
            "dtype-not-float.npz",
            "dtype-not-float",
            Some("layer1"),
        ),
        (
            "nets/small.toml",
            "wrong-shape.npz",
            "wrong-shape",
            Some("layer2"),
        ),
        ("nets/small.toml", "other-layout.npz", "other-layout", None),
        (
            "nets/small-split.toml",
            "split-bias-wrong-length.npz",
            "bias-wrong-length",
            Some("layer2.bias"),
        ),
        (
            "nets/small-split.toml",
            "split-bias-column-extra.npz",
            "bias-column-extra",
            Some("layer1.weight"),
        ),
        (
            "nets/small-split.toml",
            "split-renamed.npz",
            "tensor-missing",
            Some("layer1.weight"),
        ),
    ];
    for (net, file, code, tensor) in cases {
        let (rc, json) = audit(net, &format!("weights/mistakes/{file}"));
        assert_eq!(rc, 1, "{file}: {json:#}");
        assert_eq!(json["verdict"], "fail");
        let found = codes(&json);
        assert!(
            found.contains(&(code.to_string(), tensor.map(String::from))),
            "{file}: wanted {code} at {tensor:?}, got {found:?}"
        );
    }
}

#[test]
fn another_layout_is_named_with_the_fix() {
    let (_, json) = audit("nets/small.toml", "weights/mistakes/other-layout.npz");
    assert_eq!(json["detected_layout"], "split");
    let msg = json["findings"][0]["message"].as_str().unwrap();
    assert!(msg.contains("set layout = \"split\""), "{msg}");
    // A split-transposed file described as split: told apart by the shapes (the layers are not square).
    let (_, json) = audit(
        "nets/small-split.toml",
        "weights/small-split-transposed.safetensors",
    );
    assert_eq!(json["detected_layout"], "split-transposed");
}

#[test]
fn a_renamed_tensor_gets_the_name_to_write() {
    let (_, json) = audit(
        "nets/small-split.toml",
        "weights/mistakes/split-renamed.npz",
    );
    let f = &json["findings"]
        .as_array()
        .unwrap()
        .iter()
        .find(|f| f["code"] == "tensor-missing")
        .unwrap();
    let msg = f["message"].as_str().unwrap();
    assert!(msg.contains("weight = \"fc1.weight\""), "{msg}");
    // The stand-in is not reported a second time as unexpected.
    assert!(!codes(&json).iter().any(|(c, _)| c == "tensor-unexpected"));
}

#[test]
fn without_weights_it_lists_the_expected_shapes() {
    let run = plumb(&["shapes", "nets/small-split-transposed.toml"]);
    run.assert_code(0);
    assert!(run.stdout.contains("layer1.weight"));
    assert!(run.stdout.contains("(4, 5)"), "{}", run.stdout);
    assert!(run.stdout.contains("43"));
}

#[test]
fn the_table_shows_expected_against_found() {
    let run = plumb(&[
        "shapes",
        "nets/small.toml",
        "-w",
        "weights/mistakes/transposed.npz",
    ]);
    run.assert_code(1);
    let line = run.stdout.lines().find(|l| l.contains("layer2")).unwrap();
    assert!(
        line.contains("(3, 6)") && line.contains("(6, 3)") && line.contains("fail"),
        "{line}"
    );
    assert!(run.stdout.contains("verdict: FAIL"));
}

#[test]
fn a_square_matrix_is_flagged_as_unverifiable_by_shape() {
    // Layer 1 of nets/small.toml is 5 × (4 + 1): square, so a transposed copy has the same shape.
    let (code, json) = audit("nets/small.toml", "weights/small-augmented.npz");
    assert_eq!(code, 0);
    let notes: Vec<_> = json["findings"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|f| f["code"] == "square-matrix")
        .collect();
    assert_eq!(notes.len(), 1, "{json:#}");
    assert_eq!(notes[0]["tensor"], "layer1");
    assert_eq!(notes[0]["severity"], "note");
}
