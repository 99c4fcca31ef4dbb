//! `plumb audit` on descriptions of other kinds than dense, end to end on the layer graph. The
//! weights are drawn by NumPy (fixtures/graph-audit/generate.py, the outside source): a healthy
//! He-normal file of the CNN of fixtures/nets/pump-cnn.toml, three files with one planted fault
//! each, and an lstm whose gate biases of +20 hold its sigmoid gates at 1.

use crate::util;

use serde_json::Value;
use util::plumb;

/// The JSON report of an audit, with its exit code.
fn audit(net: &str, weights: &str, extra: &[&str]) -> (i32, Value) {
    let w = format!("graph-audit/{weights}");
    let mut args = vec!["audit", net, "-w", w.as_str(), "--format", "json"];
    args.extend(extra);
    let run = plumb(&args);
    assert!(run.code == 0 || run.code == 1, "{weights}: {}", run.stderr);
    (run.code, run.json())
}

/// The findings of a code, as (severity, tensor).
fn found(r: &Value, code: &str) -> Vec<(String, String)> {
    r["findings"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|f| f["code"] == code)
        .map(|f| {
            (
                f["severity"].as_str().unwrap().to_string(),
                f["tensor"].as_str().unwrap_or_default().to_string(),
            )
        })
        .collect()
}

fn codes(r: &Value) -> Vec<String> {
    let fs = r["findings"].as_array().unwrap();
    fs.iter()
        .map(|f| f["code"].as_str().unwrap().to_string())
        .collect()
}

#[test]
fn a_healthy_he_normal_cnn_passes_even_under_fail_on_warning() {
    let (code, r) = audit(
        "nets/pump-cnn.toml",
        "pump-cnn-healthy.npz",
        &["--fail-on", "warning", "--init", "he-normal"],
    );
    assert_eq!(code, 0, "{:?}", codes(&r));
    assert_eq!(r["verdict"], "pass");
    // Only notes: the zero biases NumPy wrote, and block.weight's equal in and out channels.
    for f in r["findings"].as_array().unwrap() {
        assert_eq!(f["severity"], "note", "{f}");
    }
    // The KS test against He-normal keeps both conv weights and the dense one.
    let init = r["init"].as_array().unwrap();
    assert_eq!(init.len(), 3, "{init:?}");
    assert_eq!(r["kind_thresholds"]["collapsed_scale"], 1e-3);
    assert!(
        r["inside"]
            .as_array()
            .unwrap()
            .iter()
            .any(|h| h["kind"] == "batch-norm")
    );
}

#[test]
fn a_collapsed_norm_scale_is_found_at_its_tensor_and_the_threshold_moves_it() {
    let (code, r) = audit("nets/pump-cnn.toml", "collapsed-scale.npz", &[]);
    assert_eq!(code, 0);
    assert_eq!(
        found(&r, "collapsed-scale"),
        [("warning".to_string(), "stem-norm.scale".to_string())]
    );
    // 1e-5 is not below a threshold of 1e-6.
    let (_, r) = audit(
        "nets/pump-cnn.toml",
        "collapsed-scale.npz",
        &["--collapsed-scale", "1e-6"],
    );
    assert!(found(&r, "collapsed-scale").is_empty(), "{:?}", codes(&r));
    // Under --fail-on warning the collapsed scale fails the run.
    let (code, _) = audit(
        "nets/pump-cnn.toml",
        "collapsed-scale.npz",
        &["--fail-on", "warning"],
    );
    assert_eq!(code, 1);
}

#[test]
fn a_dead_conv_channel_is_found_at_its_layer_and_channel() {
    let (_, r) = audit("nets/pump-cnn.toml", "dead-channel.npz", &[]);
    assert_eq!(
        found(&r, "dead-channel"),
        [("warning".to_string(), "block.weight".to_string())]
    );
    let f = r["findings"]
        .as_array()
        .unwrap()
        .iter()
        .find(|f| f["code"] == "dead-channel")
        .unwrap();
    assert_eq!(f["layer"], 3);
    assert_eq!(f["figures"]["unit"], 3);
    // The healthy file's channel 3 is not dead: the planted bias is what kills it.
    let (_, healthy) = audit("nets/pump-cnn.toml", "pump-cnn-healthy.npz", &[]);
    assert!(found(&healthy, "dead-channel").is_empty());
}

#[test]
fn a_conv_weight_in_another_storage_order_fails_at_its_tensor_and_skips_the_rest() {
    let (code, r) = audit("nets/pump-cnn.toml", "conv-storage.npz", &[]);
    assert_eq!(code, 1);
    assert_eq!(
        found(&r, "storage-order"),
        [("error".to_string(), "stem.weight".to_string())]
    );
    assert!(r["health"].as_array().unwrap().is_empty());
    assert!(!r["skipped"].as_array().unwrap().is_empty());
}

#[test]
fn a_sequence_net_built_with_saturated_gates_raises_them() {
    let (_, r) = audit("nets/audit-lstm.toml", "audit-lstm-saturated.npz", &[]);
    let gates: Vec<String> = r["inside"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|h| h["kind"] == "lstm" && !h["flagged"].as_array().unwrap().is_empty())
        .map(|h| h["part"].as_str().unwrap().to_string())
        .collect();
    // σ(20) = 1 − 2.1e-9: the three sigmoid gates (i, f, o) of all 4 units sit at 1.
    assert_eq!(gates, ["gate i", "gate f", "gate o"], "{:?}", r["inside"]);
    assert_eq!(found(&r, "saturated-gate").len(), 3);
}
