//! `plumb probe NET -- CMD ARGS`: drive the user's program over the wire protocol and check it three
//! ways — against its own loss (is it self-consistent?), its loss against the reference loss, and
//! its gradient against the reference gradient, with the diagnosis. The run and its verdicts are
//! `plumb_probe::probe`; this parses, loads, renders and sets the exit code.

use anyhow::{Result, bail};
use plumb_diagnose::Tolerances;
use plumb_fd::report::MAX_DIRECTIONS;
use plumb_fd::{Method, Sample};
use plumb_report::{Block, Case, Document, Severity, Verdict};

pub use plumb_probe::{ProbeOptions, ProbeReport, Source};

use crate::args::Inputs;
use crate::args::ProbeArgs;
use crate::commands::check::{method, step};
use crate::commands::compare::{
    certification_text, error_plot, gradient_cases, loss_case, tensor_table,
};
use crate::inputs::{WeightsSource, load_graph};
use crate::output::{CheckRow, Settings, check_table};
use plumb_engine::Batch;
use plumb_fd::report::GraphLoaded;
use plumb_report::DataSource;

pub fn run(args: &ProbeArgs, settings: &Settings) -> Result<Verdict> {
    let method = method(args.method.into());
    if method == Method::ComplexStep {
        bail!(
            "--method complex-step: the complex step needs the program to compute with complex numbers, which an outside program does not; use central, forward, five-point or richardson"
        );
    }
    let fixed = step(args.step)?;
    let sample = args
        .sample
        .as_deref()
        .map(Sample::parse)
        .transpose()
        .map_err(|e| anyhow::anyhow!("--sample: {e}"))?;
    if args.directions > MAX_DIRECTIONS {
        bail!(
            "--directions {}: at most {} random directions per tensor",
            args.directions,
            MAX_DIRECTIONS
        );
    }
    if !(args.timeout.is_finite() && args.timeout > 0.0 && args.timeout <= 86_400.0) {
        bail!(
            "--timeout {}: give the seconds to wait for each reply, between 0 and 86400",
            args.timeout
        );
    }
    let opts = ProbeOptions {
        command: args.command.clone(),
        method,
        step: fixed,
        sample,
        directions: args.directions,
        timeout: args.timeout,
        blackbox: args.blackbox,
        weights: args.weights.clone(),
    };
    let (report, doc) = match (args.inputs(), args.blackbox) {
        (Some(inputs), false) => {
            let (loaded, network) = load_graph(&inputs, settings.seed)?;
            let report = compute(Source::Graph(&loaded), &opts, settings)?;
            let mut doc = document(&report, Some(&loaded));
            doc.network = Some(network);
            (report, doc)
        }
        (None, false) => bail!(
            "give the network description NET (e.g. plumb probe net.toml -- CMD), or --blackbox to check the program against its own loss with the tensors its hello declares"
        ),
        (inputs, true) => {
            // A black box: the tensors are the program's; a description, if given, only sizes
            // the data. The weights are read by name (never fitted to a description).
            let seed = settings.seed;
            let data = args.data.clone();
            let batch_size = args.batch;
            let batch = move |hello: &plumb_probe::Hello| match &inputs {
                Some(i) => described_batch(i, seed)
                    .map_err(|e| plumb_probe::RunError::Input(format!("{e:#}"))),
                None => plumb_probe::blackbox_data(
                    hello,
                    data.as_deref(),
                    batch_size.unwrap_or(32),
                    seed,
                ),
            };
            let report = compute(
                Source::Blackbox {
                    description: args.net.clone(),
                    batch: Box::new(batch),
                },
                &opts,
                settings,
            )?;
            let doc = document(&report, None);
            (report, doc)
        }
    };
    let mut doc = doc;
    doc.command = "probe".into();
    doc.cases = report
        .self_check
        .tensors
        .iter()
        .map(|t| {
            let c = Case::new(format!("self-check {}", t.name), t.verdict == Verdict::Pass)
                .about(&t.name)
                .figure("max_rel_error", t.max_rel_error)
                .figure("mismatches", t.mismatches as f64)
                .figure("unsettled", t.unsettled as f64)
                .figure("direction_mismatches", t.direction_mismatches as f64);
            match t.verdict {
                Verdict::Pass => c,
                Verdict::Inconclusive => c.failing(
                    "inconclusive",
                    "too few coordinates or directions settled to tell a match from a mismatch",
                ),
                Verdict::Fail => c.failing(
                    "self-inconsistent",
                    "the gradient disagrees with differences of the program's own loss",
                ),
            }
        })
        .collect();
    doc.cases
        .extend(gradient_cases("reference ", &report.tensors));
    doc.cases.extend(report.loss.as_ref().map(loss_case));
    settings.emit(&report, doc)
}

/// Runs the program through the three checks (`plumb_probe::probe`) with the run's seed, its
/// progress on stderr unless quiet (shared with the demo).
pub fn compute(src: Source<'_>, opts: &ProbeOptions, settings: &Settings) -> Result<ProbeReport> {
    let note = |text: &str| settings.note(text);
    let progress: Option<&dyn Fn(&str)> = if settings.quiet { None } else { Some(&note) };
    Ok(plumb_probe::probe(src, opts, settings.seed, progress)?)
}

/// The batch a description of any kind sizes for a black box: its data file or a seeded synthetic
/// batch (x as (samples, values), a layer graph's input in channels-first order). The weights are
/// the program's, read by name, so the description's are not loaded.
fn described_batch(inputs: &Inputs, seed: u64) -> Result<(Batch, DataSource)> {
    let data_only = Inputs {
        weights: None,
        ..inputs.clone()
    };
    let (l, _) = load_graph(&data_only, seed)?;
    Ok((l.batch, l.data_source))
}

/// The probe's report as a document, for a description (`loaded`) or none.
pub fn document(r: &ProbeReport, loaded: Option<&GraphLoaded>) -> Document {
    document_with(
        r,
        loaded.map(|l| {
            let config = l.desc.graph.loss_config();
            (config.loss.to_string(), config.l2 > 0.0)
        }),
    )
}

/// The probe's report as a document; `conventions` is the reference's loss and whether it has an
/// L2 term (none for a black box).
pub fn document_with(r: &ProbeReport, conventions: Option<(String, bool)>) -> Document {
    let mut doc =
        Document::new("plumb probe — your program against its own loss and the reference");
    let p = &r.program;
    let mut facts = vec![
        (
            "program".to_string(),
            format!(
                "{} ({}, computes in {})",
                p.command,
                if p.name.is_empty() {
                    "unnamed"
                } else {
                    &p.name
                },
                p.dtype
            ),
        ),
        (
            "description".to_string(),
            r.description.as_ref().map_or_else(
                || "none (a black box: the tensors its hello declares)".to_string(),
                |p| p.display().to_string(),
            ),
        ),
        (
            "weights".to_string(),
            if r.blackbox && matches!(r.weights, WeightsSource::Init { .. }) {
                "drawn from the seed for the program's own tensors (--blackbox)".to_string()
            } else {
                r.weights.describe()
            },
        ),
        ("data".to_string(), r.data.describe()),
    ];
    if let Some(c) = &r.reference {
        facts.push(("reference".to_string(), certification_text(c)));
    }
    doc.push(Block::Facts(facts));

    let s = &r.self_check;
    doc.push(Block::Heading(
        "1. Is it self-consistent? Its gradient against differences of its own loss".into(),
    ));
    doc.push(Block::Text(format!(
        "{} differences ({}), tolerance {:e}; {} of {} parameters, {} random directions per tensor.",
        s.method, s.step_rule, s.tolerance, s.checked, s.parameters, s.directions_per_tensor
    )));
    let t = check_table(s.tensors.iter().map(|st| CheckRow {
        name: &st.name,
        parameters: st.parameters,
        checked: st.checked,
        max_rel: st.max_rel_error,
        median_rel: st.median_rel_error,
        median_bound: None,
        mismatches: st.mismatches,
        unreliable: st.unreliable,
        unsettled: st.unsettled,
        directions: st.directions,
        direction_mismatches: st.direction_mismatches,
        verdict: st.verdict,
    }));
    doc.push(Block::Table(t));

    if let (Some(l), Some((loss, l2))) = (&r.loss, conventions) {
        doc.push(Block::Heading(
            "2. Does it compute the loss the description says?".into(),
        ));
        doc.push(Block::Text(format!(
            "program {:.12e}, reference {:.12e} ({} {}): {}{}",
            l.outside,
            l.reference,
            loss,
            if l2 { "with L2" } else { "without L2" },
            if l.matches {
                "they agree"
            } else {
                "they differ"
            },
            l.explanation
                .as_deref()
                .map_or(String::new(), |e| format!(" — {e}")),
        )));
        doc.push(Block::Heading(
            "3. Its gradient against the reference gradient".into(),
        ));
        doc.push(Block::Table(tensor_table(&r.tensors)));
        let single = r.program.dtype == "f32";
        let tolerance = Tolerances::for_precision(single).agreement;
        if let Some(p) = error_plot(&r.tensors, tolerance, if single { "f32" } else { "f64" }) {
            doc.push(p);
        }
    }
    doc.push(Block::Findings(r.findings.clone()));
    let summary = match r.verdict {
        Verdict::Pass if r.blackbox => {
            "the program's gradient is consistent with its own loss".to_string()
        }
        Verdict::Pass => "self-consistent, the right loss, and the reference gradient".to_string(),
        Verdict::Inconclusive => {
            "nothing found wrong, but too little of the check against the program's own loss was settled to pass".to_string()
        }
        Verdict::Fail => {
            let n = r
                .findings
                .iter()
                .filter(|f| f.severity == Severity::Error)
                .count();
            format!("{n} error finding{}", if n == 1 { "" } else { "s" })
        }
    };
    doc.push(Block::Verdict(r.verdict, summary));
    doc
}
