//! `plumb check` and `plumb sweep` on descriptions of other kinds than dense (the layer graph).
//! The reference each check is held to is the finite difference of the loss itself: a verdict
//! `pass` means every settled coordinate agrees with it within the method's bound; a gradient with
//! one entry moved is caught by the same rule.

use crate::util;

use std::path::Path;

use plumb_engine::Init;
use plumb_fd::report::{GraphInputs, GraphLoaded, Places, RunFacts, build_graph};
use plumb_fd::{CheckConfig, Method, Precision, check_graph_gradient};
use plumb_formats::GraphDescription;
use plumb_report::Verdict;
use util::{fixture, plumb};

fn check(args: &[&str]) -> serde_json::Value {
    let mut all = vec!["check", "--format", "json", "--seed", "3"];
    all.extend_from_slice(args);
    let run = plumb(&all);
    assert!(
        run.code == 0 || run.code == 1,
        "exit {}: {}",
        run.code,
        run.stderr
    );
    let v = run.json();
    // Exit codes per DESIGN §3: 0 only for pass.
    assert_eq!(run.code == 0, v["verdict"] == "pass", "{}", run.stdout);
    v
}

#[test]
fn cnn_passes_central_and_complex_step_in_f64() {
    for method in ["central", "complex-step"] {
        let v = check(&["nets/pump-cnn.toml", "--method", method]);
        assert_eq!(v["verdict"], "pass", "{method}: {v}");
        assert_eq!(v["method"], method);
        let tensors = v["tensors"].as_array().unwrap();
        // The weight file's seven tensors: the dense head's augmented matrix holds its weight
        // and bias (the graph's eight tensors).
        assert_eq!(tensors.len(), 7, "the CNN's seven file tensors");
        for t in tensors {
            assert_eq!(t["mismatches"], 0);
            assert!(t["max_rel_error"].is_number() && t["median_rel_error"].is_number());
            assert!(t["max_bound"].is_number() && t["unreliable"].is_number());
        }
        // The worst coordinates name the file tensor, its flat index and the layer's own words.
        let w = &v["worst"][0];
        assert!(w["tensor"].is_string() && w["index"].is_u64(), "{w}");
        assert!(w["location"].as_str().unwrap().contains("channel"), "{w}");
        assert!(v["findings"].is_array());
        assert_eq!(v["coverage"]["parameters"], 99);
    }
}

#[test]
fn f32_is_no_false_fail() {
    let v = check(&["nets/pump-cnn.toml", "--precision", "f32"]);
    assert_ne!(v["verdict"], "fail", "{v}");
    let v = check(&[
        "nets/pump-sequence.toml",
        "--precision",
        "f32",
        "--batch",
        "4",
        "--sample",
        "60",
        "--directions",
        "1",
    ]);
    assert_ne!(v["verdict"], "fail", "{v}");
}

#[test]
fn sequence_net_passes_in_f64() {
    let v = check(&[
        "nets/pump-sequence.toml",
        "--batch",
        "4",
        "--sample",
        "60",
        "--directions",
        "2",
    ]);
    assert_eq!(v["verdict"], "pass", "{v}");
    let names: Vec<&str> = v["tensors"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| t["name"].as_str().unwrap())
        .collect();
    assert!(names.iter().any(|n| n.starts_with("memory.")), "{names:?}");
}

/// One gradient entry moved by 1% of the tensor's scale: the report fails, naming the tensor,
/// the flat index and the layer's words for it.
#[test]
fn a_moved_gradient_entry_fails_and_is_located() {
    let desc = GraphDescription::read(&fixture("nets/pump-cnn.toml")).unwrap();
    let inputs = GraphInputs::drawn(Init::GlorotUniform, 3, 16);
    let loaded = GraphLoaded::load(desc, &inputs).unwrap();
    let graph = &loaded.desc.graph;
    let b = &loaded.batch;
    let mut g = graph
        .gradient(&loaded.params, b.x.view(), b.y.view(), None)
        .params;
    let t = graph
        .tensors()
        .iter()
        .position(|s| s.name == "block.weight")
        .unwrap();
    let scale = g[t].iter().fold(0.0f64, |m, v| m.max(v.abs()));
    g[t].as_slice_mut().unwrap()[5] += 0.01 * scale;
    let mut config = CheckConfig::new(Method::Central, Precision::F64);
    config.seed = 3;
    let result = check_graph_gradient(
        graph,
        &loaded.params,
        b.x.view(),
        b.y.view(),
        &g,
        &config,
        &|_, _| {},
    )
    .unwrap();
    let facts = RunFacts {
        description: Path::new("pump-cnn.toml").into(),
        description_hash: String::new(),
        weights: loaded.weights_source.clone(),
        data: loaded.data_source.clone(),
        seed: 3,
        samples: b.len(),
        step: None,
        shard: None,
        gradient_norms: vec![1.0; loaded.desc.files.len()],
    };
    let report = build_graph(&facts, &Places::new(&loaded.desc), &result, 5);
    assert_eq!(report.verdict, Verdict::Fail);
    // The report's tensors are the weight file's; this conv weight is stored canonically, so
    // its file index is the graph's.
    let t = report
        .tensors
        .iter()
        .position(|r| r.name == "block.weight")
        .unwrap();
    let bad = &report.tensors[t];
    assert_eq!(bad.verdict, Verdict::Fail);
    assert_eq!(bad.mismatches, 1);
    assert_eq!(bad.worst[0].place.index, 5);
    assert_eq!(
        bad.worst[0].place.location,
        "out-channel 0, in-channel 1, kernel 2"
    );
    let f = report
        .findings
        .iter()
        .find(|f| f.code == "gradient-mismatch")
        .unwrap();
    assert_eq!(f.tensor.as_deref(), Some("block.weight"));
    assert!(f.message.contains("block.weight[5]"), "{}", f.message);
    // Every other tensor still passes.
    for (i, tr) in report.tensors.iter().enumerate() {
        if i != t {
            assert_eq!(tr.mismatches, 0, "{}", tr.name);
        }
    }
}

#[test]
fn sweep_of_a_conv_coordinate_has_a_v_curve_below_the_tolerance() {
    let run = plumb(&[
        "sweep",
        "nets/pump-cnn.toml",
        "--format",
        "json",
        "--seed",
        "3",
        "--coords",
        "block.weight:5",
        "--methods",
        "central",
    ]);
    run.assert_code(0);
    let v = run.json();
    let c = &v["coordinates"][0];
    assert_eq!(c["tensor"], "block.weight");
    assert_eq!(c["index"], 5);
    let m = &c["methods"][0];
    let best = m["best_error"].as_f64().unwrap();
    assert!(best < v["tolerance"].as_f64().unwrap(), "{v}");
    // A V: the error at both ends of the step range is far above the best.
    let errors: Vec<f64> = m["errors"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e.as_f64().unwrap_or(f64::INFINITY))
        .collect();
    assert!(errors[0] > 100.0 * best && errors[errors.len() - 1] > 100.0 * best);
    let bad = plumb(&["sweep", "nets/pump-cnn.toml", "--coords", "block.weight:48"]);
    bad.assert_code(2);
    assert!(bad.stderr.contains("0 to 47"), "{}", bad.stderr);
}

/// The sweep on sequence kinds: an lstm's recurrent weight, an attention projection and a gru's
/// recurrent weight of the demo sequence model, each with a V-curve whose best step is below the
/// tolerance (the reference gradient is right, so only the method's error remains).
#[test]
fn sweep_of_sequence_coordinates_has_v_curves_below_the_tolerance() {
    let coords = [
        ("memory.recurrent.weight", 12),
        ("look-back.query.weight", 40),
        ("layer4.recurrent.weight", 34),
    ];
    let list: Vec<String> = coords.iter().map(|(t, k)| format!("{t}:{k}")).collect();
    let run = plumb(&[
        "sweep",
        "nets/pump-sequence.toml",
        "--format",
        "json",
        "--seed",
        "3",
        "--coords",
        &list.join(","),
        "--methods",
        "central",
    ]);
    run.assert_code(0);
    let v = run.json();
    let tolerance = v["tolerance"].as_f64().unwrap();
    for (i, (tensor, index)) in coords.iter().enumerate() {
        let c = &v["coordinates"][i];
        assert_eq!(c["tensor"], *tensor, "{v}");
        assert_eq!(c["index"], *index, "{v}");
        let m = &c["methods"][0];
        let best = m["best_error"].as_f64().unwrap();
        assert!(best < tolerance, "{tensor}[{index}]: best {best}");
        let errors: Vec<f64> = m["errors"]
            .as_array()
            .unwrap()
            .iter()
            .map(|e| e.as_f64().unwrap_or(f64::INFINITY))
            .collect();
        assert!(
            errors[errors.len() - 1] > 100.0 * best,
            "{tensor}[{index}]: {errors:?}"
        );
    }
}

/// The report says how many losses came through the response of the layers above a moved entry
/// (docs/engine.md, "The response"): response.toml's first-layer units have 13 entries each, so
/// a whole check takes some, said in JSON and in a line of the table; small.toml (two layers)
/// has no response, and neither says any.
#[test]
fn the_report_counts_the_losses_through_the_response() {
    let v = check(&["nets/response.toml"]);
    assert_eq!(v["verdict"], "pass", "{v}");
    let n = v["coverage"]["responded"].as_u64().unwrap();
    assert!(n > 0, "{v}");
    let table = plumb(&["check", "--seed", "3", "nets/response.toml"]);
    let line = format!("{n} one-entry losses through the response");
    assert!(table.stdout.contains(&line), "{}", table.stdout);

    let v = check(&["nets/small.toml"]);
    assert_eq!(v["coverage"]["responded"], 0, "{v}");
    let table = plumb(&["check", "--seed", "3", "nets/small.toml"]);
    assert!(
        !table.stdout.contains("through the response"),
        "{}",
        table.stdout
    );
}
