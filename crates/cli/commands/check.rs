//! `plumb check`: the finite-difference check of the reference engine's gradient.

use anyhow::{Result, bail};
use plumb_fd::report::{
    CheckReport, Code, CoordReport, CoverageReport, GraphCheckReport, GraphCoordReport,
    GraphLoaded, MAX_DIRECTIONS, Places, graph_check_report,
};
use plumb_fd::{CheckConfig, Method, Precision, SETTLE, Sample, Status, UNSETTLED_SHARE};
use plumb_report::{
    Block, Case, Cell, Document, NetworkId, Severity, StepPanel, StripSeries, Table, Tone, Verdict,
    error_strip, step_plot,
};

use crate::args::{CheckArgs, MethodArg, PrecisionArg};
use crate::inputs::load_graph;
use crate::output::{CheckRow, Settings, check_table, num};
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
    // A dense description runs on its layer graph like every other kind; its baseline identity
    // stays the dense description's (its hash and file tensors), so baselines recorded before
    // still judge it.
    let (loaded, network) = load_graph(&args.inputs, settings.seed)?;
    let progress = Progress::new(settings, "checking");
    let report = graph_check_report(&loaded, &config, args.worst, &|d, t| progress.update(d, t))?;
    progress.finish();
    let mut doc = graph_document(&report, network, settings);
    if settings.html.is_some() {
        insert_before_findings(&mut doc, v_curves(&report, &loaded, config.precision));
    }
    settings.emit(&report, doc)
}

/// The document of a check's report (a run's or a merge's): the worst coordinates in the
/// layer's terms, one case per tensor of the weight file, and with `--html` the strip of every
/// checked coordinate.
pub fn graph_document(
    report: &GraphCheckReport,
    network: NetworkId,
    settings: &Settings,
) -> Document {
    let mut doc = document(report, Block::Table(graph_worst_table(&report.worst)));
    doc.command = "check".into();
    doc.network = Some(network);
    doc.cases = cases(report);
    if settings.html.is_some() {
        let strip = strip_plot(
            "relative error |a − n| / max(|a|, |n|, floor) of every checked coordinate",
            &report.rel_errors,
            report.tolerance,
            &report.precision,
        );
        insert_before_findings(&mut doc, strip.into_iter().collect());
    }
    doc
}

/// The V-curve of the two worst coordinates: every method's error against the step (`--html`).
pub fn v_curves(r: &GraphCheckReport, loaded: &GraphLoaded, precision: Precision) -> Vec<Block> {
    let places = Places::new(&loaded.desc);
    let coords: Vec<(usize, usize)> = r
        .worst
        .iter()
        .take(2)
        .filter_map(|w| places.entry(places.file_named(&w.place.tensor)?, w.place.index))
        .collect();
    if coords.is_empty() {
        return Vec::new();
    }
    let graph = &loaded.desc.graph;
    let (x, y) = (loaded.batch.x.view(), loaded.batch.y.view());
    let analytic = graph.parameter_gradient(&loaded.params, x, y, None).1;
    let hs = plumb_fd::steps(1e-1, 1e-14, 27);
    let plan = plumb_fd::SweepPlan {
        coords,
        methods: Method::ALL.to_vec(),
        steps: hs.clone(),
        precision,
    };
    let Ok(curves) = plumb_fd::sweep_graph(graph, &loaded.params, x, y, &analytic, &plan) else {
        return Vec::new();
    };
    let eps = precision.epsilon();
    let panels: Vec<StepPanel> = curves
        .iter()
        .map(|c| StepPanel {
            title: format!(
                "{} (worst), analytic {:.4e}",
                places.place(c.coord.0, c.coord.1).label(),
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
    match step_plot(&panels) {
        Ok(svg) => vec![plot(
            "Error against step size for the worst coordinates: truncation falls as h shrinks until round-off (ε/h) takes over.",
            svg,
        )],
        Err(_) => Vec::new(),
    }
}

/// The worst coordinates of a graph check: tensor, flat index and the layer's words for it.
pub fn graph_worst_table(worst: &[GraphCoordReport]) -> Table {
    let mut t = Table::new([
        "where",
        "layer",
        "in the layer's terms",
        "analytic",
        "numeric",
        "rel error",
        "rel bound",
        "status",
    ]);
    for w in worst {
        let place = [
            Cell::from(w.place.label()),
            Cell::from(w.place.layer.to_string()),
            Cell::from(w.place.location.clone()),
        ];
        t.push(place.into_iter().chain(measured_cells(w)));
    }
    t
}

/// The cells a worst-coordinates row ends with, after its place: analytic, numeric, relative
/// error, relative bound (the JSON's own figure, over max(|a|, |n|, floor) like the relative
/// error) and status.
fn measured_cells<P>(w: &CoordReport<P>) -> [Cell; 5] {
    let tone = status_tone(w.status);
    [
        Cell::from(format!("{:.9e}", w.analytic)),
        Cell::from(format!("{:.9e}", w.numeric)),
        Cell::new(num(w.rel_error), tone),
        Cell::from(num(w.rel_bound)),
        Cell::new(w.status.name(), tone),
    ]
}

fn status_tone(s: Status) -> Tone {
    match s {
        Status::Mismatch => Tone::Bad,
        Status::Unreliable | Status::Unsettled => Tone::Warn,
        Status::Match => Tone::Plain,
    }
}

/// One case per tensor (shared with the demo).
pub fn cases<C>(r: &CheckReport<C>) -> Vec<Case> {
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
                let f = r.findings.iter().find(|f| {
                    f.tensor.as_deref() == Some(&t.name) && f.code == Code::Unsettled.name()
                });
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

/// The check's document; `worst` is the table of its worst coordinates.
pub fn document<C>(r: &CheckReport<C>, worst: Block) -> Document {
    let mut doc = Document::new("plumb check — finite differences against the reference gradient");
    let mut facts = vec![
        ("description".into(), r.description.display().to_string()),
        ("weights".into(), r.weights.describe()),
        ("data".into(), r.data.describe()),
        (
            "method".into(),
            format!("{} ({}), in {}", r.method, r.step_rule, r.precision),
        ),
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
    ];
    // Losses not from a whole forward pass are said so (docs/engine.md, "The response").
    if r.coverage.responded > 0 {
        facts.push((
            "response".into(),
            format!(
                "{} one-entry losses through the response of the two dense layers above (a Taylor form within a tenth of a loss's round-off), not a whole pass",
                r.coverage.responded
            ),
        ));
    }
    doc.push(Block::Facts(facts));
    let t = check_table(r.tensors.iter().map(|tr| CheckRow {
        name: &tr.name,
        parameters: tr.parameters,
        checked: tr.checked,
        max_rel: tr.max_rel_error,
        median_rel: tr.median_rel_error,
        median_bound: Some(tr.median_bound),
        mismatches: tr.mismatches,
        unreliable: tr.unreliable,
        unsettled: tr.unsettled,
        directions: tr.directions,
        direction_mismatches: tr.direction_mismatches,
        verdict: tr.verdict,
    }));
    doc.push(Block::Table(t));
    if !r.worst.is_empty() {
        doc.push(Block::Heading("worst coordinates".into()));
        doc.push(worst);
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
