//! `plumb compare`: an outside gradient file against the reference gradient, with the diagnosis
//! (`plumb_diagnose::report` judges and builds the report; this renders it).

use anyhow::{Result, bail};
use plumb_diagnose::report::{
    Certification, CompareReport, LossReport, NameReport, TensorReport, compare_graph_report,
    read_gradient,
};
use plumb_formats::{FileFormat, GraphDescription, TensorFile};
use plumb_report::{Block, Case, Cell, Document, StripSeries, Table, Tone, Verdict};

use crate::args::CompareArgs;
use crate::commands::check::strip_plot;
use crate::inputs::load_graph;
use crate::output::{Settings, num, shape, verdict_cell};

pub fn run(args: &CompareArgs, settings: &Settings) -> Result<Verdict> {
    let (loaded, network) = load_graph(&args.inputs, settings.seed)?;
    let map = args.map.join(",");
    let file = npy_named(&loaded.desc, read_gradient(&loaded, &args.gradient, &map)?);
    if let Some((name, _, dtype)) = file.listing().find(|(_, _, d)| !d.is_float()) {
        bail!(
            "{}: tensor `{name}` holds {} values; a gradient must be floating point (float32 or float64)",
            args.gradient.display(),
            dtype.name()
        );
    }
    let report = compare_graph_report(
        &loaded,
        &args.gradient,
        file,
        &map,
        args.loss,
        settings.seed,
    )?;
    let mut doc = document(&report);
    doc.command = "compare".into();
    doc.network = Some(network);
    doc.cases = gradient_cases("gradient ", &report.tensors);
    doc.cases.extend(report.loss.as_ref().map(loss_case));
    settings.emit(&report, doc)
}

/// A `.npy` file holds one tensor, named after the file: when the description has one file
/// tensor, that is the one, whatever the file is called.
fn npy_named(desc: &GraphDescription, mut file: TensorFile) -> TensorFile {
    if let (FileFormat::Npy, [t], [f]) = (file.format, file.tensors.as_mut_slice(), &desc.files[..])
    {
        t.name = f.name.clone();
    }
    file
}

/// The case of the outside loss against the reference loss (shared with probe).
pub fn loss_case(l: &LossReport) -> Case {
    let c = Case::new("loss", l.matches).figure("loss_rel_error", l.rel_error);
    if l.matches {
        c
    } else {
        c.failing(
            "loss-mismatch",
            l.explanation
                .as_deref()
                .unwrap_or("the loss differs from the reference"),
        )
    }
}

/// One case per tensor of an outside gradient (shared with probe).
pub fn gradient_cases(prefix: &str, tensors: &[TensorReport]) -> Vec<Case> {
    tensors
        .iter()
        .map(|t| {
            let mut c =
                Case::new(format!("{prefix}{}", t.name), t.verdict == Verdict::Pass).about(&t.name);
            if let Some(m) = t.max_rel_error {
                c = c.figure("max_rel_error", m);
            }
            if let Some(m) = t.median_rel_error {
                c = c.figure("median_rel_error", m);
            }
            if t.verdict == Verdict::Fail {
                let code = t
                    .diagnosis
                    .as_ref()
                    .map_or("gradient-mismatch", |d| d.code.as_str());
                let why = t.diagnosis.as_ref().map_or_else(String::new, |d| {
                    if d.detail.is_empty() {
                        d.code.to_string()
                    } else {
                        format!("{} ({})", d.code, d.detail)
                    }
                });
                c = c.failing(code, format!("the gradient is wrong: {why}"));
            }
            c
        })
        .collect()
}

/// The outside gradient's relative error per entry, per tensor, against the tolerance of the
/// precision it was stored in.
pub fn error_plot(tensors: &[TensorReport], tolerance: f64, precision: &str) -> Option<Block> {
    let series: Vec<StripSeries> = tensors
        .iter()
        .filter(|t| !t.rel_errors.is_empty())
        .map(|t| StripSeries {
            label: t.name.clone(),
            values: t.rel_errors.clone(),
            bounds: Vec::new(),
        })
        .collect();
    if series.is_empty() {
        return None;
    }
    strip_plot(
        "relative error |outside − reference| / max(|outside|, |reference|, floor) of every entry",
        &series,
        tolerance,
        precision,
    )
}

fn document(r: &CompareReport) -> Document {
    let mut doc = Document::new("plumb compare — an outside gradient against the reference");
    let mut facts = vec![
        (
            "description".to_string(),
            r.description.display().to_string(),
        ),
        ("weights".to_string(), r.weights.describe()),
        ("data".to_string(), r.data.describe()),
        (
            "gradient".to_string(),
            format!(
                "{} ({}: agreement within {:e}, diagnosis residual {:e})",
                r.gradient.display(),
                if r.precision_from == "values" {
                    "f32, from its values: float64 holding only float32 values"
                } else {
                    r.precision
                },
                r.tolerance,
                r.residual_tolerance
            ),
        ),
        ("names".to_string(), names_text(&r.names)),
        ("conventions".to_string(), r.conventions.describe()),
    ];
    facts.push(("reference".to_string(), certification_text(&r.reference)));
    if let Some(l) = &r.loss {
        facts.push((
            "loss".to_string(),
            format!(
                "outside {:.12e}, reference {:.12e}, relative error {}",
                l.outside,
                l.reference,
                num(l.rel_error)
            ),
        ));
    }
    doc.push(Block::Facts(facts));
    doc.push(Block::Table(tensor_table(&r.tensors)));
    if let Some(p) = error_plot(&r.tensors, r.tolerance, r.precision) {
        doc.push(p);
    }
    doc.push(Block::Findings(r.findings.clone()));
    let bad = r
        .tensors
        .iter()
        .filter(|t| t.verdict == Verdict::Fail)
        .count();
    let summary = if r.verdict == Verdict::Pass {
        "the outside gradient agrees with the reference on every tensor".to_string()
    } else if bad == 0 {
        "the gradient agrees, but see the findings".to_string()
    } else {
        format!("{bad} of {} tensors wrong", r.tensors.len())
    };
    doc.push(Block::Verdict(r.verdict, summary));
    doc
}

/// Which file tensor went to which parameter, for the facts block.
pub fn names_text(names: &[NameReport]) -> String {
    if names.is_empty() {
        return "no tensor of the file matches a parameter".into();
    }
    if names.iter().all(|n| n.matched == "exact") {
        return "every tensor under its parameter's name".into();
    }
    names
        .iter()
        .map(|n| match (&n.habit, n.matched) {
            (_, "exact") => format!("{} (exact)", n.parameter),
            (Some(h), _) => format!("{} → {} ({h})", n.file, n.parameter),
            _ => format!("{} → {} (--map)", n.file, n.parameter),
        })
        .collect::<Vec<_>>()
        .join(", ")
}

pub fn certification_text(c: &Certification) -> String {
    format!(
        "certified by the complex step on {} of {} parameters (max relative error {}){}",
        c.checked,
        c.parameters,
        num(c.max_rel_error),
        if c.certified {
            ""
        } else {
            " — NOT certified"
        }
    )
}

pub fn tensor_table(tensors: &[TensorReport]) -> Table {
    let mut t = Table::new([
        "tensor",
        "shape",
        "max rel",
        "median rel",
        "cosine",
        "scale",
        "worst at",
        "verdict",
        "diagnosis",
    ]);
    for tr in tensors {
        let shape_text = match &tr.found_shape {
            Some(f) if f != &tr.expected_shape => {
                format!("{} (expected {})", shape(f), shape(&tr.expected_shape))
            }
            Some(f) => shape(f),
            None => "absent".to_string(),
        };
        let diag = tr.diagnosis.as_ref().map_or(String::new(), |d| {
            let mut s = d.code.to_string();
            if let Some(f) = d.factor {
                s.push_str(&format!(" ×{}", num(f)));
            }
            if !d.detail.is_empty() {
                s.push_str(&format!(" ({})", d.detail));
            }
            s
        });
        let fmt = |v: Option<f64>| v.map_or("—".to_string(), num);
        t.push([
            Cell::from(tr.name.clone()),
            Cell::from(shape_text),
            Cell::from(fmt(tr.max_rel_error)),
            Cell::from(fmt(tr.median_rel_error)),
            Cell::from(tr.cosine.map_or("—".to_string(), |c| format!("{c:.6}"))),
            Cell::from(fmt(tr.scale)),
            Cell::from(
                tr.worst
                    .as_ref()
                    .map_or("—".to_string(), |w| w.label(&tr.name)),
            ),
            verdict_cell(tr.verdict),
            Cell::new(
                diag,
                if tr.verdict == Verdict::Fail {
                    Tone::Bad
                } else {
                    Tone::Plain
                },
            ),
        ]);
    }
    t
}
