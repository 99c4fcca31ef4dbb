//! The JSON reports, pinned: each is deserialised into structs that reject unknown fields, so any
//! change to the documented schema (docs/json.md) fails here first.

use crate::util;

use serde::Deserialize;
use util::plumb;

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct Finding {
    code: String,
    severity: String,
    tensor: Option<String>,
    layer: Option<usize>,
    message: String,
    #[serde(default)]
    figures: serde_json::Map<String, serde_json::Value>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct TensorShape {
    name: String,
    role: String,
    expected: Vec<usize>,
    found: Option<Vec<usize>>,
    dtype: Option<String>,
    status: String,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct LayerShapes {
    layer: usize,
    name: String,
    kind: String,
    input: String,
    output: String,
    inputs: usize,
    units: usize,
    activation: String,
    parameters: usize,
    tensors: Vec<TensorShape>,
    verdict: String,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct Stray {
    name: String,
    shape: Vec<usize>,
    dtype: String,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct Shapes {
    verdict: String,
    schema_version: u32,
    command: String,
    description: String,
    weights: Option<String>,
    layout: String,
    detected_layout: Option<String>,
    layers: Vec<LayerShapes>,
    unexpected: Vec<Stray>,
    total_parameters: usize,
    findings: Vec<Finding>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct TensorGradient {
    name: String,
    layer: usize,
    shape: Vec<usize>,
    norm: Option<f64>,
    max_abs: Option<f64>,
    max_at: Vec<usize>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields, tag = "source", rename_all = "kebab-case")]
#[allow(dead_code)]
enum WeightsSource {
    File {
        path: String,
        format: String,
        dtype: String,
    },
    Init {
        scheme: String,
        seed: u64,
    },
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields, tag = "source", rename_all = "kebab-case")]
#[allow(dead_code)]
enum DataSource {
    File { path: String, samples: usize },
    Synthetic { samples: usize, seed: u64 },
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct Grad {
    verdict: String,
    schema_version: u32,
    command: String,
    description: String,
    weights: WeightsSource,
    data: DataSource,
    samples: usize,
    precision: String,
    loss: Option<f64>,
    data_loss: Option<f64>,
    l2_term: Option<f64>,
    tensors: Vec<TensorGradient>,
    output: Option<String>,
    findings: Vec<Finding>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct Coordinate {
    tensor: String,
    index: usize,
    layer: usize,
    location: String,
    analytic: f64,
    numeric: f64,
    abs_error: f64,
    rel_error: f64,
    bound: f64,
    rel_bound: f64,
    step: f64,
    status: String,
    retried: bool,
    one_step: bool,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct CheckTensor {
    name: String,
    layer: usize,
    parameters: usize,
    checked: usize,
    max_rel_error: f64,
    median_rel_error: f64,
    norm_rel_error: f64,
    max_bound: f64,
    median_bound: f64,
    gradient_norm: f64,
    mismatches: usize,
    unreliable: usize,
    unsettled: usize,
    settled_share: f64,
    one_step: usize,
    directions: usize,
    direction_mismatches: usize,
    verdict: String,
    worst: Vec<Coordinate>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct Direction {
    scope: String,
    layer: Option<usize>,
    bias: Option<bool>,
    analytic: f64,
    numeric: f64,
    rel_error: f64,
    bound: f64,
    status: String,
    one_step: bool,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct CheckCoverage {
    sample: String,
    default_sample: bool,
    parameters: usize,
    checked: usize,
    directions_per_part: usize,
    responded: usize,
    shared: usize,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct Check {
    verdict: String,
    schema_version: u32,
    command: String,
    description: String,
    description_hash: String,
    weights: WeightsSource,
    data: DataSource,
    seed: u64,
    samples: usize,
    method: String,
    step_rule: String,
    precision: String,
    tolerance: f64,
    floor_fraction: f64,
    loss: f64,
    coverage: CheckCoverage,
    shard: Option<[usize; 2]>,
    floors: Vec<f64>,
    tensors: Vec<CheckTensor>,
    worst: Vec<Coordinate>,
    #[serde(default)]
    coordinates: Option<Vec<Coordinate>>,
    directions: Vec<Direction>,
    findings: Vec<Finding>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct MethodCurve {
    method: String,
    errors: Vec<Option<f64>>,
    best_step: f64,
    best_error: f64,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct SweptCoordinate {
    tensor: String,
    index: usize,
    layer: usize,
    location: String,
    analytic: f64,
    chosen: String,
    methods: Vec<MethodCurve>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct Sweep {
    verdict: String,
    schema_version: u32,
    command: String,
    description: String,
    weights: WeightsSource,
    data: DataSource,
    precision: String,
    tolerance: f64,
    steps: Vec<f64>,
    coordinates: Vec<SweptCoordinate>,
    plot: Option<String>,
    findings: Vec<Finding>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct Planted {
    code: String,
    tensors: Vec<serde_json::Value>,
    findings: Vec<Finding>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct Demo {
    verdict: String,
    schema_version: u32,
    command: String,
    scenario: String,
    seed: u64,
    shapes: Shapes,
    shapes_planted: Shapes,
    grad: Grad,
    check: Check,
    planted: Planted,
    audit: serde_json::Value,
    probe: Option<serde_json::Value>,
    vibration: DemoScenario,
    hourly: DemoScenario,
    written: Vec<String>,
}

/// Scenarios (b) and (c) of the demo, on the layer graph.
#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct DemoScenario {
    verdict: String,
    scenario: String,
    loss_before: f64,
    loss_after: f64,
    shapes: serde_json::Value,
    grad: Grad,
    check: serde_json::Value,
    planted: DemoPlanted,
    audit: Option<serde_json::Value>,
    probe: Option<serde_json::Value>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct DemoPlanted {
    code: String,
    layer: String,
    compare: serde_json::Value,
}

fn first_key(stdout: &str) -> &str {
    stdout
        .trim_start()
        .trim_start_matches('{')
        .trim_start()
        .split(':')
        .next()
        .unwrap()
}

#[test]
fn shapes_report_schema() {
    for (net, w, verdict) in [
        ("nets/small.toml", "weights/small-augmented.npz", "pass"),
        (
            "nets/small.toml",
            "weights/mistakes/tensor-unexpected.npz",
            "fail",
        ),
        (
            "nets/small-split.toml",
            "weights/mistakes/split-bias-wrong-length.npz",
            "fail",
        ),
    ] {
        let run = plumb(&["shapes", net, "-w", w, "--format", "json"]);
        assert_eq!(first_key(&run.stdout), "\"verdict\"");
        let r: Shapes = serde_json::from_str(&run.stdout).unwrap();
        assert_eq!(r.verdict, verdict);
        assert_eq!((r.schema_version, r.command.as_str()), (2, "shapes"));
        assert!(
            r.findings
                .iter()
                .all(|f| ["error", "warning", "note"].contains(&f.severity.as_str()))
        );
    }
    let r: Shapes =
        serde_json::from_str(&plumb(&["shapes", "nets/small.toml", "--format", "json"]).stdout)
            .unwrap();
    assert!(r.weights.is_none());
    assert!(r.layers.iter().all(|l| l.verdict == "unchecked"));
}

#[test]
fn grad_report_schema() {
    let run = plumb(&[
        "grad",
        "nets/small.toml",
        "-w",
        "weights/small-augmented.npz",
        "-d",
        "data/small.csv",
        "--format",
        "json",
    ]);
    assert_eq!(first_key(&run.stdout), "\"verdict\"");
    let r: Grad = serde_json::from_str(&run.stdout).unwrap();
    assert_eq!(
        (r.schema_version, r.command.as_str(), r.verdict.as_str()),
        (2, "grad", "pass")
    );
    assert!(matches!(r.weights, WeightsSource::File { .. }));
    assert!(matches!(r.data, DataSource::File { samples: 8, .. }));
    assert_eq!(r.precision, "f64");
    let r: Grad =
        serde_json::from_str(&plumb(&["grad", "nets/small.toml", "--format", "json"]).stdout)
            .unwrap();
    assert!(matches!(r.weights, WeightsSource::Init { .. }));
}

#[test]
fn demo_report_schema() {
    let run = &util::demo::written().run;
    run.assert_code(0);
    let r: Demo = serde_json::from_str(&run.stdout).unwrap();
    assert_eq!(r.verdict, "pass");
    assert_eq!(r.shapes.verdict, "pass");
    assert_eq!(r.shapes_planted.verdict, "fail");
    assert!(r.scenario.contains("invented"));
    for s in [&r.vibration, &r.hourly] {
        assert_eq!(s.verdict, "pass");
        assert!(s.scenario.contains("invented"));
        assert_eq!(s.planted.compare["verdict"], "fail");
        // The NumPy example probed with the same bug: a `probe` report.
        let probe = s
            .probe
            .as_ref()
            .expect("python3 with NumPy runs the examples");
        assert_eq!(probe["command"], "probe");
    }
    assert!(r.vibration.audit.is_none() && r.hourly.audit.is_some());
}

#[test]
fn check_and_sweep_report_schemas() {
    let run = plumb(&[
        "check",
        "nets/small-split.toml",
        "-w",
        "weights/small-split.npz",
        "--format",
        "json",
    ]);
    assert_eq!(first_key(&run.stdout), "\"verdict\"");
    let r: Check = serde_json::from_str(&run.stdout).unwrap();
    assert_eq!(
        (
            r.schema_version,
            r.command.as_str(),
            r.verdict.as_str(),
            r.tensors.len()
        ),
        (2, "check", "pass", 4)
    );
    let run = plumb(&[
        "sweep",
        "nets/small.toml",
        "--coords",
        "1:0:0",
        "--format",
        "json",
    ]);
    assert_eq!(first_key(&run.stdout), "\"verdict\"");
    let r: Sweep = serde_json::from_str(&run.stdout).unwrap();
    assert_eq!(
        (
            r.command.as_str(),
            r.coordinates.len(),
            r.coordinates[0].methods.len()
        ),
        ("sweep", 1, 5)
    );
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct DiagnosisJson {
    code: String,
    detail: Option<String>,
    residual: Option<f64>,
    factor: Option<f64>,
    first_wrong_layer: Option<usize>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct NameJson {
    file: String,
    parameter: String,
    matched: String,
    habit: Option<String>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct ConventionsJson {
    reduction: String,
    l2: f64,
    l2_divisor: String,
    l2_on_bias: bool,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct WorstJson {
    /// The layer's words for the entry (unit and input; the graph tensor when the file's holds two).
    at: Option<String>,
    index: Vec<usize>,
    outside: f64,
    reference: f64,
    rel_error: f64,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct CompareTensor {
    name: String,
    layer: Option<usize>,
    verdict: String,
    expected_shape: Vec<usize>,
    found_shape: Option<Vec<usize>>,
    max_rel_error: Option<f64>,
    median_rel_error: Option<f64>,
    cosine: Option<f64>,
    scale: Option<f64>,
    worst: Option<WorstJson>,
    diagnosis: Option<DiagnosisJson>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct Certification {
    method: String,
    checked: usize,
    parameters: usize,
    max_rel_error: f64,
    certified: bool,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct LossJson {
    outside: f64,
    reference: f64,
    rel_error: f64,
    matches: bool,
    explanation: Option<String>,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(dead_code)]
struct Compare {
    verdict: String,
    schema_version: u32,
    command: String,
    description: String,
    weights: WeightsSource,
    data: DataSource,
    gradient: String,
    precision: String,
    precision_from: String,
    conventions: ConventionsJson,
    names: Vec<NameJson>,
    tolerance: f64,
    residual_tolerance: f64,
    reference: Certification,
    loss: Option<LossJson>,
    tensors: Vec<CompareTensor>,
    findings: Vec<Finding>,
}

#[test]
fn compare_report_schema() {
    for (g, verdict) in [
        ("compare/correct-f64.npz", "pass"),
        ("compare/layers-swapped.npz", "fail"),
        ("compare/constant-factor.npz", "fail"),
    ] {
        let run = plumb(&[
            "compare",
            "nets/compare.toml",
            "-w",
            "weights/compare.npz",
            "-d",
            "data/compare.csv",
            "-g",
            g,
            "--loss",
            "1.0",
            "--format",
            "json",
        ]);
        assert_eq!(first_key(&run.stdout), "\"verdict\"");
        let r: Compare = serde_json::from_str(&run.stdout)
            .unwrap_or_else(|e| panic!("{g}: {e}\n{}", run.stdout));
        assert_eq!(r.command, "compare");
        assert_eq!(r.tensors.len(), 3);
        assert_eq!(r.names.len(), 3);
        assert!(
            r.names
                .iter()
                .all(|n| n.matched == "exact" && n.habit.is_none())
        );
        assert_eq!(
            (
                r.conventions.reduction.as_str(),
                r.conventions.l2_divisor.as_str()
            ),
            ("mean", "2m")
        );
        assert_eq!(r.precision_from, "dtype");
        let _ = verdict;
    }
}

#[test]
fn audit_report_schema() {
    use std::collections::BTreeSet;
    let run = plumb(&[
        "audit",
        "nets/audit.toml",
        "-w",
        "audit/dead-unit.npz",
        "-d",
        "data/audit.csv",
        "--init",
        "he-normal",
        "--format",
        "json",
    ]);
    assert_eq!(first_key(&run.stdout), "\"verdict\"");
    let j = run.json();
    let keys = |v: &serde_json::Value| {
        v.as_object()
            .unwrap()
            .keys()
            .cloned()
            .collect::<BTreeSet<String>>()
    };
    let set = |k: &[&str]| {
        k.iter()
            .map(|s| s.to_string())
            .collect::<BTreeSet<String>>()
    };
    assert_eq!(
        keys(&j),
        set(&[
            "verdict",
            "schema_version",
            "command",
            "description",
            "weights",
            "data",
            "fail_on",
            "claimed_init",
            "thresholds",
            "shapes",
            "health",
            "init",
            "flow",
            "skipped",
            "findings"
        ])
    );
    assert_eq!(
        keys(&j["health"][0]),
        set(&[
            "layer",
            "activation",
            "units",
            "unit_name",
            "measure",
            "fractions",
            "mean_fraction",
            "flagged",
            "histogram",
            "range"
        ])
    );
    assert_eq!(
        keys(&j["init"][0]),
        set(&[
            "layer",
            "tensor",
            "fan_in",
            "fan_out",
            "std",
            "closest",
            "ratio",
            "reference",
            "reference_ratio",
            "test"
        ])
    );
    assert_eq!(
        keys(&j["init"][0]["test"]),
        set(&[
            "scheme",
            "statistic",
            "p_value",
            "adjusted_p_value",
            "passed"
        ])
    );
    assert_eq!(
        keys(&j["flow"][0]),
        set(&[
            "layer",
            "activation_std",
            "gradient_norm",
            "gradient_rms",
            "sigma_max"
        ])
    );
    assert_eq!(j["health"][0]["flagged"], serde_json::json!([5]));
}
