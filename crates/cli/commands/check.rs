//! `plumb check`: the finite-difference check of the reference engine's gradient.

use std::path::PathBuf;

use anyhow::{Result, bail};
use plumb_engine::Weights;
use plumb_fd::{
    CheckConfig, CheckResult, FLOOR, Method, Part, Precision, SETTLE, Sample, Scope, Settlement,
    Status, UNSETTLED_SHARE, check, summarise,
};
use plumb_report::{
    Block, Case, Cell, Document, Finding, Severity, StepPanel, StripSeries, Table, Tone, Verdict,
    error_strip, step_plot,
};
use serde::Serialize;

use crate::args::{CheckArgs, MethodArg, PrecisionArg};
use crate::commands::locate::{Place, Tensors};
use crate::inputs::{DataSource, Loaded, WeightsSource, load};
use crate::output::{SCHEMA_VERSION, Settings, network_id, num};
use crate::progress::Progress;

pub fn method(m: MethodArg) -> Method {
    match m {
        MethodArg::Central => Method::Central,
        MethodArg::Forward => Method::Forward,
        MethodArg::FivePoint => Method::FivePoint,
        MethodArg::Richardson => Method::Richardson,
        MethodArg::ComplexStep => Method::ComplexStep,
    }
}

pub fn precision(p: PrecisionArg) -> Precision {
    match p {
        PrecisionArg::F64 => Precision::F64,
        PrecisionArg::F32 => Precision::F32,
    }
}

/// `--shard K/N`, 1 ≤ K ≤ N.
fn parse_shard(text: &str) -> Result<(usize, usize)> {
    let parsed = text.split_once('/').and_then(|(k, n)| {
        Some((
            k.trim().parse::<usize>().ok()?,
            n.trim().parse::<usize>().ok()?,
        ))
    });
    match parsed {
        Some((k, n)) if k >= 1 && k <= n && n <= 10_000 => Ok((k, n)),
        _ => bail!(
            "--shard `{text}`: write K/N with 1 ≤ K ≤ N ≤ 10000, e.g. --shard 2/4 for the second of four"
        ),
    }
}

/// `--step` must be a usable step.
pub fn step(h: Option<f64>) -> Result<Option<f64>> {
    match h {
        Some(h) if !(h.is_finite() && h > 0.0) => {
            bail!("--step {h}: a step must be a finite number > 0 (e.g. --step 1e-6)")
        }
        other => Ok(other),
    }
}

/// A number in scientific notation with nine decimals (enough to see two close values differ).
struct Sci(f64);

impl std::fmt::Display for Sci {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{:.9e}", self.0)
    }
}

/// The most random directions per part a run takes (each costs four whole forward passes).
pub const MAX_DIRECTIONS: usize = 1000;

/// One coordinate of the report.
#[derive(Clone, Debug, Serialize)]
pub struct CoordReport {
    #[serde(flatten)]
    pub place: Place,
    pub analytic: f64,
    pub numeric: f64,
    pub abs_error: f64,
    pub rel_error: f64,
    pub bound: f64,
    /// The bound over the relative error's denominator, max(|a|, |n|, floor): comparable with
    /// `rel_error`.
    pub rel_bound: f64,
    pub step: f64,
    pub status: &'static str,
    /// Whether a smaller step was needed to step off a kink.
    pub retried: bool,
}

/// One tensor of the report.
#[derive(Clone, Debug, Serialize)]
pub struct TensorReport {
    pub name: String,
    pub layer: usize,
    pub parameters: usize,
    pub checked: usize,
    pub max_rel_error: f64,
    pub median_rel_error: f64,
    pub norm_rel_error: f64,
    /// ‖∂J/∂(W, b)‖₂ over the whole tensor (the reference gradient).
    pub gradient_norm: f64,
    pub max_bound: f64,
    pub median_bound: f64,
    pub mismatches: usize,
    pub unreliable: usize,
    /// Coordinates neither a match nor a mismatch: the method's bound exceeds a tenth of the value.
    pub unsettled: usize,
    /// The share of checked coordinates settled (a match or a mismatch).
    pub settled_share: f64,
    pub directions: usize,
    pub direction_mismatches: usize,
    pub verdict: Verdict,
    pub worst: Vec<CoordReport>,
}

/// One direction of the report.
#[derive(Clone, Debug, Serialize)]
pub struct DirectionReport {
    /// The tensor it spans, or "all" for a global direction.
    pub scope: String,
    /// The 1-based layer and part (bias weights or the others) it spans; null for a global one.
    pub layer: Option<usize>,
    pub bias: Option<bool>,
    pub analytic: f64,
    pub numeric: f64,
    pub rel_error: f64,
    pub bound: f64,
    pub status: &'static str,
}

#[derive(Clone, Debug, Serialize)]
pub struct CoverageReport {
    pub sample: String,
    pub default_sample: bool,
    pub parameters: usize,
    pub checked: usize,
    pub directions_per_part: usize,
}

/// The JSON report of `plumb check` (docs/json.md).
#[derive(Serialize)]
pub struct CheckReport {
    pub verdict: Verdict,
    pub schema_version: u32,
    pub command: &'static str,
    pub description: PathBuf,
    /// The network's identity (docs/json.md, baselines): `plumb merge` checks the description
    /// it reads is the one the shards ran on.
    pub description_hash: String,
    pub weights: WeightsSource,
    pub data: DataSource,
    /// The seed of the sample, the directions and any initialised weights or synthetic data.
    pub seed: u64,
    pub samples: usize,
    pub method: &'static str,
    pub step_rule: String,
    pub precision: &'static str,
    pub tolerance: f64,
    pub floor_fraction: f64,
    pub loss: f64,
    pub coverage: CoverageReport,
    /// (k, n) when this run checked the k-th of n shares (--shard k/n).
    pub shard: Option<[usize; 2]>,
    /// The relative error's floor per layer.
    pub floors: Vec<f64>,
    pub tensors: Vec<TensorReport>,
    pub worst: Vec<CoordReport>,
    /// Every checked coordinate, in a sharded run (what `plumb merge` joins).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub coordinates: Option<Vec<CoordReport>>,
    pub directions: Vec<DirectionReport>,
    pub findings: Vec<Finding>,
    /// Every checked coordinate's relative error and relative bound, per tensor (for the HTML
    /// plot; not in JSON).
    #[serde(skip)]
    pub rel_errors: Vec<StripSeries>,
}

pub fn coord_report(tensors: &Tensors, result: &CheckResult, i: usize) -> CoordReport {
    let c = &result.coords[i];
    let den = c
        .analytic
        .abs()
        .max(c.numeric.abs())
        .max(result.floors[c.coord.layer]);
    CoordReport {
        rel_bound: if den > 0.0 { c.bound / den } else { 0.0 },
        place: tensors.place(c.coord),
        analytic: c.analytic,
        numeric: c.numeric,
        abs_error: c.abs_error,
        rel_error: c.rel_error,
        bound: c.bound,
        step: c.step,
        status: c.status.name(),
        retried: c.retried,
    }
}

pub fn run(args: &CheckArgs, settings: &Settings) -> Result<Verdict> {
    let sample = args
        .sample
        .as_deref()
        .map(Sample::parse)
        .transpose()
        .map_err(|e| anyhow::anyhow!("--sample: {e}"))?;
    if args.directions > MAX_DIRECTIONS {
        bail!(
            "--directions {}: at most {MAX_DIRECTIONS} random directions per tensor part",
            args.directions
        );
    }
    if let Some(t) = args.tolerance.filter(|t| !(t.is_finite() && *t > 0.0)) {
        bail!("--tolerance {t}: give a finite relative tolerance > 0 (e.g. 1e-6)");
    }
    let mut config = CheckConfig::new(method(args.method), precision(args.precision));
    config.step = step(args.step)?;
    config.sample = sample;
    config.directions = Some(args.directions);
    config.seed = settings.seed;
    config.tolerance = args.tolerance;
    config.shard = args.shard.as_deref().map(parse_shard).transpose()?;
    let loaded = load(&args.inputs, settings.seed)?;
    let progress = Progress::new(settings, "checking");
    let report = compute(&loaded, &config, args.worst, &|d, t| progress.update(d, t))?;
    progress.finish();
    let mut doc = document(&report);
    doc.command = "check".into();
    doc.network = Some(network_id(&loaded.desc));
    doc.cases = cases(&report);
    if settings.html.is_some() {
        insert_before_findings(&mut doc, plots(&report, &loaded, config.precision));
    }
    settings.emit(&report, doc)
}

/// One case per tensor (shared with the demo).
pub fn cases(r: &CheckReport) -> Vec<Case> {
    r.tensors
        .iter()
        .map(|t| {
            let c = Case::new(format!("gradient {}", t.name), t.verdict == Verdict::Pass)
                .about(&t.name)
                .figure("max_rel_error", t.max_rel_error)
                .figure("median_rel_error", t.median_rel_error)
                .figure("norm_rel_error", t.norm_rel_error)
                .figure("gradient_norm", t.gradient_norm)
                .figure("median_bound", t.median_bound)
                .figure("mismatches", t.mismatches as f64)
                .figure("unreliable", t.unreliable as f64)
                .figure("unsettled", t.unsettled as f64)
                .figure("direction_mismatches", t.direction_mismatches as f64);
            if t.verdict == Verdict::Pass {
                c
            } else if t.verdict == Verdict::Inconclusive {
                let f = r
                    .findings
                    .iter()
                    .find(|f| f.tensor.as_deref() == Some(&t.name) && f.code == "unsettled");
                c.failing(
                    "inconclusive",
                    f.map_or(String::new(), |f| f.message.clone()),
                )
            } else {
                let f = r.findings.iter().find(|f| {
                    f.tensor.as_deref() == Some(&t.name) && f.severity == Severity::Error
                });
                c.failing(
                    f.map_or("gradient-mismatch", |f| f.code.as_str()),
                    f.map_or(String::new(), |f| f.message.clone()),
                )
            }
        })
        .collect()
}

/// The check's pictures: relative error per tensor against each coordinate's error bound and the
/// tolerance, and the V-curve of the worst coordinates (shared with the demo).
pub fn plots(r: &CheckReport, loaded: &Loaded, precision: Precision) -> Vec<Block> {
    let mut out: Vec<Block> = strip_plot(
        "relative error |a − n| / max(|a|, |n|, floor) of every checked coordinate",
        &r.rel_errors,
        r.tolerance,
        r.precision,
    )
    .into_iter()
    .collect();
    let net = &loaded.desc.network;
    let coords: Vec<plumb_engine::Coord> = r
        .worst
        .iter()
        .take(2)
        .map(|w| plumb_engine::Coord {
            layer: w.place.layer - 1,
            row: w.place.row,
            col: w.place.column,
        })
        .collect();
    if coords.is_empty() {
        return out;
    }
    let (_, analytic) = net.gradient(
        &loaded.weights,
        loaded.batch.x.view(),
        loaded.batch.y.view(),
    );
    let hs = plumb_fd::steps(1e-1, 1e-14, 27);
    let plan = plumb_fd::SweepPlan {
        coords,
        methods: Method::ALL.to_vec(),
        steps: hs.clone(),
        precision,
    };
    let curves = plumb_fd::sweep(net, &loaded.weights, &loaded.batch, &analytic, &plan);
    let tensors = Tensors::new(&loaded.desc);
    let eps = precision.epsilon();
    let panels: Vec<StepPanel> = curves
        .iter()
        .map(|c| StepPanel {
            title: format!(
                "{} (worst), analytic {:.4e}",
                tensors.place(c.coord).label(),
                c.analytic
            ),
            steps: hs.clone(),
            series: Method::ALL
                .iter()
                .enumerate()
                .map(|(m, name)| {
                    (
                        name.name().to_string(),
                        (0..hs.len()).map(|i| c.error(m, i, 0.0)).collect(),
                    )
                })
                .collect(),
            marks: vec![("∛ε".into(), eps.cbrt()), ("√ε".into(), eps.sqrt())],
        })
        .collect();
    if let Ok(svg) = step_plot(&panels) {
        out.push(plot("Error against step size for the worst coordinates: truncation falls as h shrinks until round-off (ε/h) takes over.", svg));
    }
    out
}

/// Relative errors per tensor on a log axis (check, compare, probe), against plumb's own figures:
/// the tolerance of the precision, and each point's error bound where a method measured it.
pub fn strip_plot(
    title: &str,
    series: &[StripSeries],
    tolerance: f64,
    precision: &str,
) -> Option<Block> {
    let label = format!("tolerance {tolerance:.0e} ({precision})");
    let svg = error_strip(title, series, &[(tolerance, &label)]).ok()?;
    let bounds = series.iter().any(|s| !s.bounds.is_empty());
    let caption = if bounds {
        "Relative error per tensor: each dot a coordinate, the grey dash at its place across the \
         error its finite-difference method can explain there, the dashed line plumb's tolerance \
         for the precision. A coordinate is wrong only above both."
    } else {
        "Relative error per tensor: each dot an entry, the dashed line plumb's tolerance for the \
         precision the gradient was stored in."
    };
    Some(plot(caption, svg))
}

pub fn plot(title: &str, svg: String) -> Block {
    Block::Plot {
        title: title.to_string(),
        svg,
    }
}

/// Blocks placed before the document's first findings.
pub fn insert_before_findings(doc: &mut Document, blocks: Vec<Block>) {
    let at = doc
        .blocks
        .iter()
        .position(|b| matches!(b, Block::Findings(_)))
        .unwrap_or(doc.blocks.len());
    for (i, b) in blocks.into_iter().enumerate() {
        doc.blocks.insert(at + i, b);
    }
}

/// Runs the check and builds its report (shared with the demo).
pub fn compute(
    loaded: &Loaded,
    config: &CheckConfig,
    worst_n: usize,
    progress: plumb_fd::Progress<'_>,
) -> Result<CheckReport> {
    let net = &loaded.desc.network;
    let result = check(net, &loaded.weights, &loaded.batch, config, progress)?;
    let facts = RunFacts {
        description: loaded.desc.path.clone(),
        description_hash: network_id(&loaded.desc).hash,
        weights: loaded.weights_source.clone(),
        data: loaded.data_source.clone(),
        seed: config.seed,
        samples: loaded.batch.len(),
        step: config.step,
        shard: config.shard,
        gradient_norms: Tensors::new(&loaded.desc)
            .parts()
            .iter()
            .map(|(p, _)| part_norm(&result.analytic, p))
            .collect(),
    };
    Ok(build(&facts, &Tensors::new(&loaded.desc), &result, worst_n))
}

/// What a report says of the run besides its results.
pub struct RunFacts {
    pub description: PathBuf,
    pub description_hash: String,
    pub weights: WeightsSource,
    pub data: DataSource,
    pub seed: u64,
    pub samples: usize,
    pub step: Option<f64>,
    pub shard: Option<(usize, usize)>,
    /// ‖∂J/∂(W, b)‖₂ of each tensor, over all its entries (checked or not).
    pub gradient_norms: Vec<f64>,
}

/// The 2-norm of a gradient over a part (a tensor under the layout).
fn part_norm(gradient: &Weights<f64>, part: &Part) -> f64 {
    let layer = gradient.layer(part.layer);
    let sum: f64 = layer
        .indexed_iter()
        .filter(|((_, col), _)| if *col == 0 { part.bias } else { part.weights })
        .map(|(_, v)| v * v)
        .sum();
    sum.sqrt()
}

/// The report of a check's results (shared with `plumb merge`).
pub fn build(
    facts: &RunFacts,
    tensors: &Tensors,
    result: &CheckResult,
    worst_n: usize,
) -> CheckReport {
    let summaries = &summarise(result, &tensors.parts());
    let mut findings = Vec::new();
    let mut tensor_reports = Vec::new();
    for (s, e) in summaries.iter().zip(&tensors.expected) {
        let worst: Vec<CoordReport> = s
            .worst
            .iter()
            .map(|&i| coord_report(tensors, result, i))
            .collect();
        if s.mismatches > 0 {
            let w = &worst[0];
            findings.push(
                Finding::new(
                    "gradient-mismatch",
                    Severity::Error,
                    format!(
                        "{} of {} checked coordinates disagree beyond what {} differences can explain; worst at {} (layer {}, row {}, column {}{}, unit {}): analytic {}, numeric {}, relative error {}, relative bound {}",
                        s.mismatches,
                        s.checked,
                        result.method,
                        w.place.label(),
                        w.place.layer,
                        w.place.row,
                        w.place.column,
                        if w.place.bias { " = bias" } else { "" },
                        w.place.unit,
                        Sci(w.analytic),
                        Sci(w.numeric),
                        num(w.rel_error),
                        num(w.rel_bound),
                    ),
                )
                .tensor(&e.name)
                .layer(e.layer + 1)
                .figure("mismatches", s.mismatches)
                .figure("checked", s.checked)
                .figure("max_rel_error", s.max_rel_error),
            );
        }
        if s.direction_mismatches > 0 {
            findings.push(
                Finding::new(
                    "direction-mismatch",
                    Severity::Error,
                    format!(
                        "{} of {} random directions over this tensor disagree: its gradient is wrong somewhere, checked coordinate or not",
                        s.direction_mismatches, s.directions
                    ),
                )
                .tensor(&e.name)
                .layer(e.layer + 1)
                .figure("direction_mismatches", s.direction_mismatches),
            );
        }
        let conclusive = s.conclusive();
        let open = s.settled_coords.unsettled;
        if open > 0 || s.settled_directions.unsettled > 0 {
            findings.push(
                Finding::new(
                    "unsettled",
                    if conclusive {
                        Severity::Note
                    } else {
                        Severity::Warning
                    },
                    format!(
                        "{open} of {} checked coordinates ({} unreliable at kinks) and {} of {} directions are unsettled: {} differences in {} cannot tell a match from a mismatch there (their error bound exceeds {}% of the value){}",
                        s.checked,
                        s.unreliable,
                        s.settled_directions.unsettled,
                        s.directions,
                        result.method,
                        result.precision.name(),
                        SETTLE * 100.0,
                        if conclusive {
                            format!("; within the {}% a check may leave open", UNSETTLED_SHARE * 100.0)
                        } else {
                            format!("; more than the {}% a check may leave open, so this tensor is inconclusive", UNSETTLED_SHARE * 100.0)
                        }
                    ),
                )
                .tensor(&e.name)
                .layer(e.layer + 1)
                .figure("unsettled", s.unsettled)
                .figure("unreliable", s.unreliable)
                .figure("checked", s.checked)
                .figure("settled_share", s.settled_coords.share())
                .figure("unsettled_directions", s.settled_directions.unsettled),
            );
        }
        if s.unreliable > 0 {
            findings.push(
                Finding::new(
                    "kink-unreliable",
                    Severity::Note,
                    format!(
                        "{} coordinate{} straddle a ReLU-like kink at every step tried (down to 1/1000 of the default), so finite differences cannot judge {}; not counted as mismatches",
                        s.unreliable,
                        if s.unreliable == 1 { "" } else { "s" },
                        if s.unreliable == 1 { "it" } else { "them" }
                    ),
                )
                .tensor(&e.name)
                .layer(e.layer + 1)
                .figure("unreliable", s.unreliable),
            );
        }
        tensor_reports.push(TensorReport {
            name: e.name.clone(),
            layer: e.layer + 1,
            parameters: s.parameters,
            checked: s.checked,
            max_rel_error: s.max_rel_error,
            median_rel_error: s.median_rel_error,
            norm_rel_error: s.norm_rel_error,
            gradient_norm: facts
                .gradient_norms
                .get(tensor_reports.len())
                .copied()
                .unwrap_or(f64::NAN),
            max_bound: s.max_bound,
            median_bound: s.median_bound,
            mismatches: s.mismatches,
            unreliable: s.unreliable,
            unsettled: s.unsettled,
            settled_share: s.settled_coords.share(),
            directions: s.directions,
            direction_mismatches: s.direction_mismatches,
            verdict: if !s.passed() {
                Verdict::Fail
            } else if !conclusive {
                Verdict::Inconclusive
            } else {
                Verdict::Pass
            },
            worst,
        });
    }
    let global_bad = result
        .directions
        .iter()
        .filter(|d| d.scope == Scope::Global && d.status == Status::Mismatch)
        .count();
    if global_bad > 0 {
        findings.push(
            Finding::new(
                "direction-mismatch",
                Severity::Error,
                format!("{global_bad} random directions over the whole network disagree with the gradient"),
            )
            .figure("direction_mismatches", global_bad),
        );
    }
    let global = Settlement::of(
        result
            .directions
            .iter()
            .filter(|d| d.scope == Scope::Global)
            .map(|d| d.status),
    );
    // Directions stand in for unchecked coordinates: with every coordinate checked, theirs do not
    // decide (see PartSummary::conclusive).
    let all_checked = result.coverage.checked >= result.coverage.parameters;
    let conclusive =
        (global.conclusive() || all_checked) && summaries.iter().all(|s| s.conclusive());
    if !conclusive {
        let all = Settlement::of(result.coords.iter().map(|c| c.status));
        let unreliable = result
            .coords
            .iter()
            .filter(|c| c.status == Status::Unreliable)
            .count();
        findings.push(
            Finding::new(
                "inconclusive",
                Severity::Warning,
                format!(
                    "{} of {} checked coordinates and {} of {} directions over the whole network are unsettled: more than the {}% a check may leave open, so it can neither pass nor fail. What would settle them: {}",
                    all.unsettled,
                    all.checked,
                    global.unsettled,
                    global.checked,
                    UNSETTLED_SHARE * 100.0,
                    remedies(result.method, result.precision, unreliable, all.unsettled)
                ),
            )
            .figure("unsettled", all.unsettled)
            .figure("checked", all.checked)
            .figure("settled_share", all.share()),
        );
    }
    let retried = result.coords.iter().filter(|c| c.retried).count();
    if retried > 0 {
        findings.push(
            Finding::new(
                "kink-retried",
                Severity::Note,
                format!("{retried} coordinates straddled a kink at the default step and were checked with a smaller one"),
            )
            .figure("retried", retried),
        );
    }
    let mut order: Vec<usize> = (0..result.coords.len()).collect();
    order.sort_by(|&i, &j| {
        let (a, b) = (&result.coords[i], &result.coords[j]);
        plumb_fd::worst_first((a.status, a.rel_error), (b.status, b.rel_error))
    });
    let worst = order
        .iter()
        .take(worst_n)
        .map(|&i| coord_report(tensors, result, i))
        .collect();
    let directions = result
        .directions
        .iter()
        .map(|d| DirectionReport {
            scope: match d.scope {
                Scope::Global => "all".to_string(),
                Scope::Part { layer, bias } => tensors.name_of(layer, bias),
            },
            layer: match d.scope {
                Scope::Global => None,
                Scope::Part { layer, .. } => Some(layer + 1),
            },
            bias: match d.scope {
                Scope::Global => None,
                Scope::Part { bias, .. } => Some(bias),
            },
            analytic: d.analytic,
            numeric: d.numeric,
            rel_error: d.rel_error,
            bound: d.bound,
            status: d.status.name(),
        })
        .collect();
    let step_rule = match facts.step {
        Some(h) => format!("fixed h = {h:e} (--step)"),
        None => result
            .method
            .step_rule(result.precision.epsilon())
            .to_string(),
    };
    CheckReport {
        verdict: Verdict::of_check(&findings, conclusive),
        schema_version: SCHEMA_VERSION,
        command: "check",
        description: facts.description.clone(),
        description_hash: facts.description_hash.clone(),
        weights: facts.weights.clone(),
        data: facts.data.clone(),
        seed: facts.seed,
        samples: facts.samples,
        method: result.method.name(),
        step_rule,
        precision: result.precision.name(),
        tolerance: result.tolerance,
        floor_fraction: FLOOR,
        loss: result.loss,
        coverage: CoverageReport {
            sample: result.coverage.sample.to_string(),
            default_sample: result.coverage.default_sample,
            parameters: result.coverage.parameters,
            checked: result.coverage.checked,
            directions_per_part: result.coverage.directions,
        },
        shard: facts.shard.map(|(k, n)| [k, n]),
        floors: result.floors.clone(),
        tensors: tensor_reports,
        worst,
        coordinates: facts.shard.map(|_| {
            (0..result.coords.len())
                .map(|i| coord_report(tensors, result, i))
                .collect()
        }),
        directions,
        findings,
        rel_errors: summaries
            .iter()
            .zip(&tensors.expected)
            .map(|(s, e)| {
                let (values, bounds) = (0..result.coords.len())
                    .filter(|&i| s.part.contains(&result.coords[i]))
                    .map(|i| {
                        let c = coord_report(tensors, result, i);
                        (c.rel_error, c.rel_bound)
                    })
                    .unzip();
                StripSeries {
                    label: e.name.clone(),
                    values,
                    bounds,
                }
            })
            .collect(),
    }
}

/// What would settle a check that stayed open, in plumb's flags, most effective first.
pub fn remedies(
    method: Method,
    precision: Precision,
    unreliable: usize,
    unsettled: usize,
) -> String {
    let mut out = Vec::new();
    if method != Method::ComplexStep {
        out.push(
            "the complex step (--method complex-step), which has no round-off from subtraction",
        );
    }
    if precision == Precision::F32 {
        out.push("f64 (--precision f64): f32's round-off is most of the error bound");
    }
    if method != Method::ComplexStep && unsettled > unreliable {
        out.push("a larger step (--step H) where round-off dominates");
    }
    if unreliable > 0 {
        out.push("fewer coordinates at kinks (data or weights with fewer pre-activations at a kink, or --sample to leave them out)");
    }
    out.join("; ")
}

/// What was covered, in one sentence.
pub fn coverage_text(c: &CoverageReport) -> String {
    let what = if c.checked == c.parameters {
        format!("all {} parameters", c.parameters)
    } else {
        format!(
            "{} of {} parameters (--sample {})",
            c.checked, c.parameters, c.sample
        )
    };
    let default = if c.default_sample && c.checked != c.parameters {
        " — the default for networks over 20000 parameters; --sample all checks every one"
    } else {
        ""
    };
    format!(
        "{what}{default}; plus {} random directions per tensor part and over the whole network",
        c.directions_per_part
    )
}

pub fn document(r: &CheckReport) -> Document {
    let mut doc = Document::new("plumb check — finite differences against the reference gradient");
    doc.push(Block::Facts(vec![
        ("description".into(), r.description.display().to_string()),
        ("weights".into(), r.weights.describe()),
        ("data".into(), r.data.describe()),
        ("method".into(), format!("{} ({}), in {}", r.method, r.step_rule, r.precision)),
        ("coverage".into(), coverage_text(&r.coverage)),
        (
            "verdict rule".into(),
            format!(
                "mismatch when |a − n| exceeds the method's own error bound and the relative error |a − n| / max(|a|, |n|, {}% of the layer's largest |a|) exceeds {:e}; unsettled when it is not a mismatch but the bound exceeds {}% of that denominator; inconclusive when more than {}% of a tensor's checked coordinates (or of its directions, when its coordinates were sampled) are unsettled or unreliable",
                (r.floor_fraction * 100.0).round(),
                r.tolerance,
                SETTLE * 100.0,
                UNSETTLED_SHARE * 100.0
            ),
        ),
    ]));
    let mut t = Table::new([
        "tensor",
        "parameters",
        "checked",
        "max rel",
        "median rel",
        "bound",
        "mismatch",
        "unreliable",
        "unsettled",
        "directions",
        "verdict",
    ]);
    for tr in &r.tensors {
        let bad = |n: usize| if n > 0 { Tone::Bad } else { Tone::Plain };
        t.push([
            Cell::from(tr.name.clone()),
            Cell::from(tr.parameters.to_string()),
            Cell::from(tr.checked.to_string()),
            Cell::new(num(tr.max_rel_error), bad(tr.mismatches)),
            Cell::from(num(tr.median_rel_error)),
            Cell::from(num(tr.median_bound)),
            Cell::new(tr.mismatches.to_string(), bad(tr.mismatches)),
            Cell::new(
                tr.unreliable.to_string(),
                if tr.unreliable > 0 {
                    Tone::Warn
                } else {
                    Tone::Plain
                },
            ),
            Cell::new(
                tr.unsettled.to_string(),
                if tr.unsettled > 0 {
                    Tone::Warn
                } else {
                    Tone::Plain
                },
            ),
            Cell::new(
                format!(
                    "{}/{}",
                    tr.directions - tr.direction_mismatches,
                    tr.directions
                ),
                bad(tr.direction_mismatches),
            ),
            verdict_cell(tr.verdict),
        ]);
    }
    doc.push(Block::Table(t));
    if !r.worst.is_empty() {
        doc.push(Block::Heading("worst coordinates".into()));
        doc.push(Block::Table(worst_table(&r.worst)));
    }
    doc.push(Block::Findings(r.findings.clone()));
    let errors = r
        .findings
        .iter()
        .filter(|f| f.severity == Severity::Error)
        .count();
    let summary = if r.verdict == Verdict::Inconclusive {
        let settled: usize = r
            .tensors
            .iter()
            .map(|t| t.checked - t.unsettled - t.unreliable)
            .sum();
        let checked: usize = r.tensors.iter().map(|t| t.checked).sum();
        format!(
            "{settled} of {checked} checked coordinates settled: too few to pass, and nothing found wrong"
        )
    } else if errors == 0 {
        format!(
            "the reference gradient agrees with {} differences on everything checked",
            r.method
        )
    } else {
        format!(
            "{errors} disagreement finding{}",
            if errors == 1 { "" } else { "s" }
        )
    };
    doc.push(Block::Verdict(r.verdict, summary));
    doc
}

pub fn verdict_cell(v: Verdict) -> Cell {
    match v {
        Verdict::Pass => Cell::new("pass", Tone::Good),
        Verdict::Fail => Cell::new("fail", Tone::Bad),
        Verdict::Inconclusive => Cell::new("inconclusive", Tone::Warn),
    }
}

pub fn worst_table(worst: &[CoordReport]) -> Table {
    let mut t = Table::new([
        "where",
        "layer",
        "row",
        "col",
        "unit",
        "analytic",
        "numeric",
        "rel error",
        "rel bound",
        "status",
    ]);
    for w in worst {
        let tone = match w.status {
            "mismatch" => Tone::Bad,
            "unreliable" | "unsettled" => Tone::Warn,
            _ => Tone::Plain,
        };
        t.push([
            Cell::from(w.place.label()),
            Cell::from(w.place.layer.to_string()),
            Cell::from(w.place.row.to_string()),
            Cell::from(if w.place.bias {
                "0 (bias)".to_string()
            } else {
                w.place.column.to_string()
            }),
            Cell::from(w.place.unit.to_string()),
            Cell::from(format!("{:.9e}", w.analytic)),
            Cell::from(format!("{:.9e}", w.numeric)),
            Cell::new(num(w.rel_error), tone),
            Cell::from(num(
                w.bound / w.analytic.abs().max(w.numeric.abs()).max(f64::MIN_POSITIVE)
            )),
            Cell::new(w.status, tone),
        ]);
    }
    t
}
