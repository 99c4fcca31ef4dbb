//! Shards of a layer-graph check and their merge (`plumb_fd::report::Shards<GraphPlace>`): the
//! shares of one check partition it exactly, and the merged report equals the unsharded one
//! field by field (the JSON compared whole, without the list of every coordinate a merge adds),
//! on a conv network and a sequence network, f64 and f32. The reference is plumb's own unsharded
//! run: what is tested is that splitting and joining change nothing. Edited shards are refused,
//! naming the file and what is wrong.

use std::path::{Path, PathBuf};

use plumb_formats::GraphDescription;

use crate::graph_common::{loaded, net};
use plumb_fd::report::{
    GraphCheckReport, GraphLoaded, GraphPlace, Places, Shards, fuzz_shard, graph_check_report,
};
use plumb_fd::{CheckConfig, Method, Precision, Sample, graph_sample};
use serde_json::Value;

/// One way of checking a network.
struct Run {
    net: &'static str,
    samples: usize,
    precision: Precision,
    sample: Option<Sample>,
    directions: usize,
    /// Into how many shards it is split.
    n: usize,
}

const RUNS: [Run; 5] = [
    Run {
        net: "pump-cnn.toml",
        samples: 16,
        precision: Precision::F64,
        sample: None,
        directions: 2,
        n: 3,
    },
    Run {
        net: "pump-cnn.toml",
        samples: 16,
        precision: Precision::F32,
        sample: None,
        directions: 2,
        n: 4,
    },
    Run {
        net: "pump-sequence.toml",
        samples: 4,
        precision: Precision::F64,
        sample: Some(Sample::Total(60)),
        directions: 1,
        n: 2,
    },
    Run {
        net: "pump-sequence.toml",
        samples: 4,
        precision: Precision::F32,
        sample: Some(Sample::PerLayer(9)),
        directions: 2,
        n: 5,
    },
    // The whole check takes first-layer losses through the response (13 entries a unit), each
    // shard a third of them: the shards must decide as the whole check does.
    Run {
        net: "response.toml",
        samples: 6,
        precision: Precision::F64,
        sample: None,
        directions: 2,
        n: 3,
    },
];

fn config(run: &Run, shard: Option<(usize, usize)>) -> CheckConfig {
    let mut c = CheckConfig::new(Method::Central, Precision::F64);
    c.precision = run.precision;
    c.sample = run.sample;
    c.directions = Some(run.directions);
    c.seed = 3;
    c.shard = shard;
    c
}

fn check(l: &GraphLoaded, run: &Run, shard: Option<(usize, usize)>) -> GraphCheckReport {
    graph_check_report(l, &config(run, shard), 5, &|_, _| {}).unwrap()
}

/// The shards of `run`, as the files `plumb check --shard K/N --format json` writes.
fn shard_files(l: &GraphLoaded, run: &Run) -> Vec<(PathBuf, Vec<u8>)> {
    (1..=run.n)
        .map(|k| {
            let report = check(l, run, Some((k, run.n)));
            let name = format!("shard{k}of{}.json", run.n);
            (PathBuf::from(name), serde_json::to_vec(&report).unwrap())
        })
        .collect()
}

#[test]
fn merged_graph_shards_equal_the_whole_check() {
    for run in &RUNS {
        let what = format!("{} {}", run.net, run.precision.name());
        let l = loaded(run.net, run.samples);
        let whole = check(&l, run, None);
        let mut files = shard_files(&l, run);
        // The order given does not matter.
        files.reverse();
        let shards = Shards::<GraphPlace>::parse(&files).unwrap();
        let merged = shards.merge_graph(&l.desc, 5).unwrap();

        // The shares partition the run's sample exactly: every coordinate once, in its order.
        let graph = &l.desc.graph;
        let sample = run
            .sample
            .unwrap_or_else(|| Sample::default_for_parameters(graph.parameters()));
        let drawn = graph_sample(graph, sample, 3).unwrap();
        let joined: Vec<(String, usize)> = merged
            .coordinates
            .as_ref()
            .unwrap()
            .iter()
            .map(|c| (c.place.tensor.clone(), c.place.index))
            .collect();
        // Located in the weight file (the dense head's augmented matrix holds its weight and
        // bias): the places of the drawn (tensor, flat index) pairs.
        let places = Places::new(&l.desc);
        let expected: Vec<(String, usize)> = drawn
            .iter()
            .map(|&(t, k)| {
                let p = places.place(t, k);
                (p.tensor, p.index)
            })
            .collect();
        assert_eq!(joined, expected, "{what}");
        let counts: Vec<usize> = files
            .iter()
            .map(|(_, b)| {
                let v: Value = serde_json::from_slice(b).unwrap();
                v["coordinates"].as_array().unwrap().len()
            })
            .collect();
        assert!(counts.iter().all(|&c| c > 0), "{what}: {counts:?}");
        assert_eq!(merged.directions.len(), whole.directions.len(), "{what}");
        // The losses through a response: each shard's own, adding up to the whole check's
        // (the JSON compared below holds the count too); none where the net has no response.
        let responded: Vec<u64> = files
            .iter()
            .map(|(_, b)| {
                let v: Value = serde_json::from_slice(b).unwrap();
                v["coverage"]["responded"].as_u64().unwrap()
            })
            .collect();
        let total = whole.coverage.responded;
        assert_eq!(merged.coverage.responded, total, "{what}");
        assert_eq!(responded.iter().sum::<u64>(), total as u64, "{what}");
        // The direction losses from a shared change of z: the shards' sum is the whole's.
        let shared: u64 = files
            .iter()
            .map(|(_, b)| {
                let v: Value = serde_json::from_slice(b).unwrap();
                v["coverage"]["shared"].as_u64().unwrap()
            })
            .sum();
        assert_eq!(merged.coverage.shared, whole.coverage.shared, "{what}");
        assert_eq!(shared, whole.coverage.shared as u64, "{what}");
        if run.net == "response.toml" {
            assert!(responded.iter().all(|&r| r > 0), "{what}: {responded:?}");
        } else {
            assert_eq!(total, 0, "{what}: no response in this net");
        }

        // Field by field: the whole JSON, less the list of every coordinate a merge adds.
        let mut m = serde_json::to_value(&merged).unwrap();
        assert!(m["shard"].is_null(), "{what}");
        m.as_object_mut().unwrap().remove("coordinates");
        let w = serde_json::to_value(&whole).unwrap();
        assert_eq!(
            m, w,
            "{what}: the merged report differs from the whole run's"
        );
        // The figures the HTML plots too, which JSON leaves out.
        assert_eq!(merged.rel_errors.len(), whole.rel_errors.len());
        for (a, b) in merged.rel_errors.iter().zip(&whole.rel_errors) {
            assert_eq!(a.label, b.label);
            let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
            assert_eq!(bits(&a.values), bits(&b.values), "{what}: {}", a.label);
            assert_eq!(bits(&a.bounds), bits(&b.bounds), "{what}: {}", a.label);
        }
    }
}

/// Shards written before `coverage.responded` existed still merge (the field reads as 0, and so
/// does the merged count); with it, the merged count is their sum.
#[test]
fn shards_without_the_response_count_still_merge() {
    let run = &RUNS[4];
    assert_eq!(run.net, "response.toml");
    let l = loaded(run.net, run.samples);
    let files = shard_files(&l, run);
    let with = Shards::<GraphPlace>::parse(&files)
        .unwrap()
        .merge_graph(&l.desc, 5)
        .unwrap();
    assert!(with.coverage.responded > 0);
    let older: Vec<(PathBuf, Vec<u8>)> = files
        .iter()
        .map(|(p, b)| {
            let mut v: Value = serde_json::from_slice(b).unwrap();
            let cov = v["coverage"].as_object_mut().unwrap();
            assert!(cov.remove("responded").is_some());
            (p.clone(), serde_json::to_vec(&v).unwrap())
        })
        .collect();
    let merged = Shards::<GraphPlace>::parse(&older)
        .unwrap()
        .merge_graph(&l.desc, 5)
        .unwrap();
    assert_eq!(merged.coverage.responded, 0);
    assert_eq!(merged.coverage.checked, with.coverage.checked);
}

/// The shards of the conv network's f64 check, as JSON values, and a way to merge edited ones.
fn cnn_split() -> (GraphLoaded, Vec<Value>) {
    let run = &RUNS[0];
    let l = loaded(run.net, run.samples);
    let values = shard_files(&l, run)
        .into_iter()
        .map(|(_, b)| serde_json::from_slice(&b).unwrap())
        .collect();
    (l, values)
}

fn merge(l: &GraphLoaded, shards: &[(&str, &Value)]) -> Result<GraphCheckReport, String> {
    let files: Vec<(PathBuf, Vec<u8>)> = shards
        .iter()
        .map(|(name, v)| (PathBuf::from(name), serde_json::to_vec(v).unwrap()))
        .collect();
    Shards::<GraphPlace>::parse(&files)
        .and_then(|s| s.merge_graph(&l.desc, 5))
        .map_err(|e| e.to_string())
}

#[test]
fn edited_graph_shards_are_refused_naming_the_file() {
    let (l, s) = cnn_split();
    merge(
        &l,
        &[("a.json", &s[0]), ("b.json", &s[1]), ("c.json", &s[2])],
    )
    .unwrap();
    let edited = |f: &dyn Fn(&mut Value)| {
        let mut v = s[1].clone();
        f(&mut v);
        v
    };
    let other_tensor = s[1]["coordinates"][0]["tensor"] != "stem.weight";
    let cases: Vec<(Value, Vec<&str>)> = vec![
        (
            edited(&|v| {
                coords(v).remove(3);
            }),
            vec!["cut short"],
        ),
        (
            edited(&|v| {
                let c = coords(v)[0].clone();
                coords(v)[1] = c;
            }),
            vec!["coordinate 2", "edited"],
        ),
        (
            edited(&|v| {
                let c = coords(v)[0].clone();
                coords(v).push(c);
            }),
            vec!["cut short or edited"],
        ),
        (
            edited(&|v| coords(v)[0]["tensor"] = "ghost.weight".into()),
            vec![
                "coordinate 1",
                "`ghost.weight` is not a tensor",
                "pump-cnn.toml",
            ],
        ),
        (
            edited(&|v| coords(v)[2]["index"] = 4000.into()),
            vec!["coordinate 3", "index 4000 is outside"],
        ),
        (
            edited(&|v| {
                coords(v)[0]["tensor"] = if other_tensor {
                    "stem.weight"
                } else {
                    "block.weight"
                }
                .into()
            }),
            vec!["coordinate 1", "edited"],
        ),
        (
            edited(&|v| coords(v)[1]["location"] = "channel 9".into()),
            vec!["coordinate 2", "edited"],
        ),
        (
            edited(&|v| {
                v["directions"][0]["scope"] = "classes.bias".into();
                v["directions"][0]["layer"] = 7.into();
            }),
            vec!["direction 1", "spans classes.bias", "edited"],
        ),
        (
            edited(&|v| v["directions"][1]["layer"] = 99.into()),
            vec!["direction 2", "`layer` 99"],
        ),
        (
            edited(&|v| v["shard"] = serde_json::json!([2, 4])),
            vec!["split 4 ways"],
        ),
        (
            edited(&|v| v["description_hash"] = "0000000000000000".into()),
            vec!["`description_hash` differs"],
        ),
        (
            edited(&|v| v["schema_version"] = 999.into()),
            vec!["`schema_version` is 999"],
        ),
    ];
    for (v, says) in &cases {
        let e = merge(&l, &[("a.json", &s[0]), ("b.json", v), ("c.json", &s[2])]).unwrap_err();
        assert!(
            e.starts_with("b.json: "),
            "the edited file is not named: {e}"
        );
        for w in says {
            assert!(e.contains(w), "`{w}` not in: {e}");
        }
    }
    // A share missing or given twice names the files.
    let e = merge(&l, &[("a.json", &s[0]), ("c.json", &s[2])]).unwrap_err();
    assert!(
        e.contains("2/3 missing") && e.contains("a.json (1/3)"),
        "{e}"
    );
    let e = merge(
        &l,
        &[("a.json", &s[0]), ("a2.json", &s[0]), ("c.json", &s[2])],
    )
    .unwrap_err();
    assert!(e.contains("a.json and a2.json are both shard 1/3"), "{e}");
    // Another description than the one the shards ran on: the conv layers' four channels become five.
    let text = std::fs::read_to_string(net("pump-cnn.toml"))
        .unwrap()
        .replace("channels = 4", "channels = 5");
    let other = GraphDescription::parse(Path::new("other.toml"), &text).unwrap();
    let files: Vec<(PathBuf, Vec<u8>)> = s
        .iter()
        .enumerate()
        .map(|(k, v)| (format!("{k}.json").into(), serde_json::to_vec(v).unwrap()))
        .collect();
    let e = Shards::<GraphPlace>::parse(&files)
        .unwrap()
        .merge_graph(&other, 5)
        .unwrap_err()
        .to_string();
    assert!(
        e.starts_with("other.toml: the description is not the one the shards were run on"),
        "{e}"
    );
}

/// The fuzz corpus's graph shard (fuzz/README.md) reads as one — only its other half is missing —
/// by `plumb merge`'s reader and by the fuzz target's.
#[test]
fn the_corpus_graph_shard_reads_as_a_graph_shard() {
    let path =
        Path::new(env!("CARGO_MANIFEST_DIR")).join("../../fuzz/corpus/shard/graph-cnn-1of2.json");
    let files = [(PathBuf::from("graph.json"), std::fs::read(&path).unwrap())];
    let e = Shards::<GraphPlace>::parse(&files).unwrap_err().to_string();
    assert!(
        e.contains("2/2 missing") && e.contains("graph.json (1/2)"),
        "{e}"
    );
    let e = fuzz_shard(&files[0].1).unwrap_err();
    assert!(
        e.contains("2/2 missing") && e.contains("fuzz.json (1/2)"),
        "{e}"
    );
}

/// A shard's list of coordinates, to edit.
fn coords(v: &mut Value) -> &mut Vec<Value> {
    v["coordinates"].as_array_mut().unwrap()
}

/// A shard records the description's identity, and merge refuses shards of another description.
/// Settings that change the function but not one shape — attention heads, the causal mask, L2,
/// the reduction — must change that identity (they once did not: the hash held shapes only), and
/// a comment or blank line must not.
#[test]
fn the_graph_identity_follows_every_setting_that_changes_the_function() {
    let text = std::fs::read_to_string(
        Path::new(env!("CARGO_MANIFEST_DIR")).join("../../examples/pump-attention.toml"),
    )
    .unwrap();
    let hash = |text: &str| {
        let desc = GraphDescription::parse(Path::new("pump-attention.toml"), text).unwrap();
        plumb_fd::report::description_hash(&desc)
    };
    let base = hash(&text);
    assert_eq!(hash(&format!("# a comment\n\n{text}")), base);
    for (what, edited) in [
        ("heads", text.replace("heads = 2", "heads = 4")),
        ("causal", text.replace("causal = true", "causal = false")),
        ("l2", text.replace("l2 = 0.01", "l2 = 0.02")),
        ("reduction", format!("reduction = \"sum\"\n{text}")),
    ] {
        assert_ne!(edited, text, "{what}: the edit must apply");
        assert_ne!(hash(&edited), base, "{what} left the identity unchanged");
    }
}
