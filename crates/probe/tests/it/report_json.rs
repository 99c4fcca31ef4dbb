//! The probe report read back: a report deserialised from its own JSON and serialised again gives
//! the same bytes, for runs that fill every part of it (the dense and the layer-graph reference,
//! a pass and a planted mistake with its diagnosis, a black box). The programs are the NumPy
//! examples (examples/python; they need python3 with NumPy, which .ci/run installs).

use std::path::{Path, PathBuf};

use plumb_engine::Init;
use plumb_fd::report::{GraphInputs, GraphLoaded};
use plumb_fd::{Method, Sample};
use plumb_formats::GraphDescription;
use plumb_probe::{ProbeOptions, ProbeReport, Source, blackbox_data, probe};
use plumb_report::Verdict;

fn repo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../..")
}

/// Whether python3 with NumPy is here; under CI (`CI` set) it must be.
fn have_numpy() -> bool {
    let ok = std::process::Command::new("python3")
        .args(["-c", "import numpy"])
        .status()
        .is_ok_and(|s| s.success());
    assert!(
        ok || std::env::var_os("CI").is_none(),
        "these tests need python3 with NumPy: pip install numpy (see .ci/run)"
    );
    if !ok {
        eprintln!("SKIPPED: no python3 with NumPy");
    }
    ok
}

fn options(program: &str, extra: &[&str]) -> ProbeOptions {
    let mut command = vec!["python3".to_string(), program.to_string()];
    command.extend(extra.iter().map(|s| s.to_string()));
    ProbeOptions {
        command,
        method: Method::Central,
        step: None,
        sample: Some(Sample::Total(40)),
        directions: 2,
        timeout: 60.0,
        blackbox: false,
        weights: None,
    }
}

/// Serialises `r`, reads it back and serialises that: the two texts are the same bytes.
fn assert_round_trip(r: &ProbeReport, what: &str) -> serde_json::Value {
    let text = serde_json::to_string_pretty(r).unwrap();
    let back: ProbeReport =
        serde_json::from_str(&text).unwrap_or_else(|e| panic!("{what}: not read back: {e}"));
    assert_eq!(serde_json::to_string_pretty(&back).unwrap(), text, "{what}");
    serde_json::from_str(&text).unwrap()
}

/// A dense description on the layer graph, its weights and batch drawn from the seed.
fn dense() -> GraphLoaded {
    let desc = GraphDescription::read(&repo().join("examples/pump.toml")).unwrap();
    assert!(desc.is_dense());
    let inputs = GraphInputs::drawn(Init::GlorotUniform, 3, 16);
    GraphLoaded::load(desc, &inputs).unwrap()
}

#[test]
fn a_dense_probe_report_reads_back_to_the_same_bytes() {
    if !have_numpy() {
        return;
    }
    let loaded = dense();
    let program = repo().join("examples/python/pump_numpy.py");
    let program = program.to_str().unwrap();
    for (extra, verdict) in [
        (&[][..], Verdict::Pass),
        (&["--plant", "sign-flipped:2"][..], Verdict::Fail),
    ] {
        let r = probe(Source::Graph(&loaded), &options(program, extra), 5, None).unwrap();
        assert_eq!(r.verdict, verdict, "{extra:?}: {:?}", r.findings);
        let j = assert_round_trip(&r, &format!("pump_numpy.py {extra:?}"));
        // The parts the run filled are in what was compared.
        assert!(j["loss"].is_object() && j["reference"].is_object(), "{j}");
        if verdict == Verdict::Fail {
            let diagnosed = j["tensors"].as_array().unwrap().iter().any(|t| {
                // The file's augmented matrix, its entry named in the layer's words.
                t["diagnosis"]["code"].is_string()
                    && t["name"].as_str().is_some_and(|n| n.starts_with("layer"))
                    && t["worst"]["at"]
                        .as_str()
                        .is_some_and(|a| a.contains("unit "))
            });
            assert!(diagnosed, "{j}");
        }
    }
}

#[test]
fn a_graph_probe_report_reads_back_to_the_same_bytes() {
    if !have_numpy() {
        return;
    }
    let desc = GraphDescription::read(&repo().join("examples/pump-cnn.toml")).unwrap();
    let inputs = GraphInputs::drawn(Init::HeNormal, 4, 8);
    let loaded = GraphLoaded::load(desc, &inputs).unwrap();
    let program = repo().join("examples/python/cnn_numpy.py");
    let program = program.to_str().unwrap();
    for (extra, verdict) in [
        (&["--input-gradient"][..], Verdict::Pass),
        (&["--plant", "kernel-flipped:conv2"][..], Verdict::Fail),
    ] {
        let r = probe(Source::Graph(&loaded), &options(program, extra), 5, None).unwrap();
        assert_eq!(r.verdict, verdict, "{extra:?}: {:?}", r.findings);
        let j = assert_round_trip(&r, &format!("cnn_numpy.py {extra:?}"));
        if verdict == Verdict::Fail {
            let diagnosed = j["tensors"]
                .as_array()
                .unwrap()
                .iter()
                .any(|t| t["diagnosis"]["code"].is_string() && t["worst"]["at"].is_string());
            assert!(diagnosed, "{j}");
        }
    }
}

#[test]
fn a_black_box_probe_report_reads_back_to_the_same_bytes() {
    if !have_numpy() {
        return;
    }
    let program = repo().join("examples/python/pump_numpy.py");
    let mut opts = options(program.to_str().unwrap(), &[]);
    opts.blackbox = true;
    let src = Source::Blackbox {
        description: None,
        batch: Box::new(|hello| blackbox_data(hello, None, 16, 6)),
    };
    let r = probe(src, &opts, 6, None).unwrap();
    let j = assert_round_trip(&r, "pump_numpy.py as a black box");
    assert!(j["loss"].is_null() && j["description"].is_null(), "{j}");
}
