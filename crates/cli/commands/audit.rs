//! `plumb audit NET -w W [-d PROBE]`: the release audit of a weight file, on the layer graph for
//! a description of any kind.

use std::path::Path;

use anyhow::{Result, anyhow, bail};
use plumb_audit::{Audit, KindThresholds, Thresholds, audit_graph_file};
use plumb_engine::Init;
use plumb_fd::report::{GraphInputs, GraphLoaded};
use plumb_formats::{AxisOrder, GraphDescription, TensorFile};
use plumb_report::{Block, Case, Document, HeatRow, Severity, Verdict, heatmap, histogram};
use serde::Serialize;

use crate::args::{AuditArgs, FailOn};
use crate::commands::check::plot;
use crate::commands::shapes;
use crate::inputs::{DataSource, init_scheme};
use crate::output::{SCHEMA_VERSION, Settings, network_id};

/// The JSON report of `plumb audit` (docs/json.md).
#[derive(Serialize)]
pub struct AuditReport<'a> {
    pub verdict: Verdict,
    pub schema_version: u32,
    pub command: &'static str,
    pub description: &'a std::path::Path,
    pub weights: &'a std::path::Path,
    pub data: DataSource,
    pub fail_on: &'static str,
    pub claimed_init: Option<&'static str>,
    pub thresholds: &'a Thresholds,
    /// The thresholds of measures only other kinds than dense have; absent for a dense network.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub kind_thresholds: Option<&'a KindThresholds>,
    #[serde(flatten)]
    pub audit: &'a Audit,
}

pub fn run(args: &AuditArgs, settings: &Settings) -> Result<Verdict> {
    let checks: [(&str, f64, bool); 10] = [
        (
            "--max-magnitude",
            args.max_magnitude,
            args.max_magnitude > 0.0,
        ),
        (
            "--symmetry-tolerance",
            args.symmetry_tolerance,
            args.symmetry_tolerance >= 0.0,
        ),
        (
            "--saturation",
            args.saturation,
            args.saturation > 0.0 && args.saturation < 0.5,
        ),
        (
            "--saturated-fraction",
            args.saturated_fraction,
            args.saturated_fraction > 0.0 && args.saturated_fraction <= 1.0,
        ),
        (
            "--layer-fraction",
            args.layer_fraction,
            args.layer_fraction > 0.0 && args.layer_fraction <= 1.0,
        ),
        (
            "--layer-mean",
            args.layer_mean,
            args.layer_mean > 0.0 && args.layer_mean <= 1.0,
        ),
        ("--scale-factor", args.scale_factor, args.scale_factor > 1.0),
        ("--flow-orders", args.flow_orders, args.flow_orders > 0.0),
        (
            "--ks-alpha",
            args.ks_alpha,
            args.ks_alpha > 0.0 && args.ks_alpha < 1.0,
        ),
        (
            "--collapsed-scale",
            args.collapsed_scale,
            args.collapsed_scale > 0.0,
        ),
    ];
    for (flag, v, ok) in checks {
        if !(v.is_finite() && ok) {
            bail!(
                "{flag} {v}: out of range; see `plumb audit --help` for what it means and its default"
            );
        }
    }
    let t = Thresholds {
        max_magnitude: args.max_magnitude,
        symmetry_tolerance: args.symmetry_tolerance,
        saturation: args.saturation,
        saturated_fraction: args.saturated_fraction,
        layer_fraction: args.layer_fraction,
        layer_mean: args.layer_mean,
        scale_factor: args.scale_factor,
        flow_orders: args.flow_orders,
        ks_alpha: args.ks_alpha,
        fail_on: match args.fail_on {
            FailOn::Warning => Severity::Warning,
            FailOn::Error => Severity::Error,
        },
    };
    let desc = GraphDescription::read(&args.net)?;
    let network = network_id(&desc);
    let file = desc.read_weights(&args.weights)?;
    let order = if args.channels_last {
        AxisOrder::ChannelsLast
    } else {
        AxisOrder::ChannelsFirst
    };
    // Only the probe batch is used from the load; the weights are the file's, finite or not.
    // An f32 data file's x is kept in f32: the probe pass of an f32 file reads it as it is.
    let probe = GraphLoaded::load_kept(
        desc,
        &GraphInputs {
            weights: None,
            data: args.data.as_deref(),
            order,
            init: Init::GlorotUniform,
            seed: settings.seed,
            samples: args.batch,
        },
        &|_, _, _| Ok(()),
    )?;
    let desc = &probe.desc;
    let k = KindThresholds {
        collapsed_scale: args.collapsed_scale,
    };
    let claimed = args.init.map(init_scheme);
    let result = audit_graph_file(
        desc,
        &file,
        &args.weights,
        &probe.batch,
        claimed,
        &t,
        &k,
        settings.seed,
    )
    .map_err(|e| anyhow!("{}: {e}", args.net.display()))?;
    if !result.shapes.fits_any() {
        return Err(foreign(args, &file));
    }
    let shape_audit = &result.shapes;
    let report = AuditReport {
        verdict: result.verdict,
        schema_version: SCHEMA_VERSION,
        command: "audit",
        description: &args.net,
        weights: &args.weights,
        data: probe.data_source.clone(),
        fail_on: t.fail_on.name(),
        claimed_init: claimed.map(|c| c.name()),
        thresholds: &t,
        kind_thresholds: (!desc.is_dense()).then_some(&k),
        audit: &result,
    };
    let mut sd = shapes::graph_document(desc, &args.net, Some((&args.weights, &file)), shape_audit);
    sd.blocks.retain(|b| matches!(b, Block::Table(_)));
    let mut doc = document(&report, &file, &args.weights, sd.blocks);
    doc.command = "audit".into();
    doc.network = Some(network);
    doc.fail_on = t.fail_on;
    doc.cases = cases(&result);
    if settings.html.is_some() {
        crate::commands::check::insert_before_findings(&mut doc, plots(&result, desc, &file));
    }
    settings.emit(&report, doc)
}

/// A weight file none of whose tensors fits (in any layout) is another network's: unusable input.
fn foreign(args: &AuditArgs, file: &TensorFile) -> anyhow::Error {
    let found: Vec<String> = file
        .listing()
        .take(6)
        .map(|(name, shape, _)| format!("`{name}` {}", crate::output::shape(shape)))
        .collect();
    if found.is_empty() {
        return anyhow!(
            "{}: the file holds no tensors; give the weight file of {} (write it with np.savez or safetensors' save_file)",
            args.weights.display(),
            args.net.display()
        );
    }
    anyhow!(
        "{}: none of its tensors fits {} in any layout (it holds {}); these weights belong to another network — run `plumb shapes` to compare",
        args.weights.display(),
        args.net.display(),
        found.join(", ")
    )
}

/// The shape cases, then the audit's own (one per layer's tensor, one for the network).
pub fn cases(a: &Audit) -> Vec<Case> {
    let s = &a.shapes;
    let mut out = shapes::tensor_cases(s.tensors(), &s.unexpected, &s.findings);
    out.extend(a.cases());
    out
}

/// Unit health as a heatmap, one row per hidden layer with a measure.
fn health_plot(a: &Audit) -> Vec<Block> {
    let mut out = Vec::new();
    let rows: Vec<HeatRow> = a
        .health
        .iter()
        .filter(|h| h.measure.is_some())
        .map(|h| HeatRow {
            label: format!("layer {} ({})", h.layer, h.activation),
            values: h.fractions.clone(),
        })
        .collect();
    if !rows.is_empty()
        && let Ok(svg) = heatmap(
            "fraction of probe samples on which each unit is inactive (ReLU) or saturated (sigmoid, tanh)",
            &rows,
        )
    {
        out.push(plot(
            "Unit health on the probe data: one cell per unit, white 0, red 1.",
            svg,
        ));
    }
    out
}

/// The audit's pictures: unit health as a heatmap, each weight tensor against its scheme's
/// density (a dense layer's weights without the bias).
pub fn plots(a: &Audit, desc: &GraphDescription, file: &TensorFile) -> Vec<Block> {
    let mut out = health_plot(a);
    if a.init.is_empty() {
        return out;
    }
    let Ok(params) = desc.read_params(file, &desc.path) else {
        return out;
    };
    for i in &a.init {
        // The init row names the file tensor; its graph weight is the first tensor it holds.
        let Some(f) = desc.files.iter().find(|f| f.name == i.tensor) else {
            continue;
        };
        let values: Vec<f64> = params[f.tensors[0]].iter().copied().collect();
        let scheme = i
            .test
            .as_ref()
            .and_then(|t| Init::from_name(t.scheme))
            .or(Init::from_name(i.closest))
            .unwrap_or(Init::GlorotUniform);
        let sd = scheme.std_dev(i.fan_in, i.fan_out);
        let density = move |x: f64| {
            if scheme.is_uniform() {
                let half = 3f64.sqrt() * sd;
                if x.abs() <= half {
                    1.0 / (2.0 * half)
                } else {
                    0.0
                }
            } else {
                (-(x * x) / (2.0 * sd * sd)).exp() / (sd * (2.0 * std::f64::consts::PI).sqrt())
            }
        };
        let label = format!("{} density", scheme.name());
        if let Ok(svg) = histogram(
            &format!("{} weights (bias aside)", i.tensor),
            &values,
            0,
            Some((&label, &density)),
        ) {
            out.push(plot(
                &format!(
                    "Weights of {} against the {} density.",
                    i.tensor,
                    scheme.name()
                ),
                svg,
            ));
        }
    }
    out
}

fn document(
    r: &AuditReport<'_>,
    file: &TensorFile,
    weights: &Path,
    shape_tables: Vec<Block>,
) -> Document {
    let a = r.audit;
    let mut doc = Document::new("plumb audit — is this weight file fit to ship?");
    doc.push(Block::Facts(vec![
        ("description".into(), r.description.display().to_string()),
        (
            "weights".into(),
            format!(
                "{} ({}, {} tensors)",
                weights.display(),
                file.format.name(),
                file.count()
            ),
        ),
        ("probe data".into(), r.data.describe()),
        (
            "claimed init".into(),
            r.claimed_init
                .map_or("none (--init tests a claim)".to_string(), str::to_string),
        ),
        ("fails on".into(), format!("{} and worse", r.fail_on)),
    ]));

    doc.push(Block::Heading("shapes".into()));
    for b in shape_tables {
        doc.push(b);
    }

    for b in a.sections() {
        doc.push(b);
    }
    for s in &a.skipped {
        doc.push(Block::Text(format!("Not checked — {s}.")));
    }
    doc.push(Block::Findings(a.findings.clone()));
    doc.push(Block::Verdict(r.verdict, a.summary()));
    doc.push(Block::Caution(
        "This audit checks the file's structure and health on the probe data. It is not a safety \
         assessment: it says nothing of accuracy, robustness or fairness. A model that will decide \
         about machinery, vehicles, medicine or people needs the validation the applicable standards \
         require and review by people qualified to give it."
            .into(),
    ));
    doc
}
