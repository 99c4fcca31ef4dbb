//! `plumb grad NET [-w W] [-d D] [-o G] [--input-gradient]`: the reference loss and gradient on
//! the layer graph, for a description of any kind.

use std::path::Path;

use anyhow::{Result, bail};
use plumb_fd::Precision;
pub use plumb_fd::report::GradReport;
use plumb_fd::report::graph_gradient_report;
use plumb_formats::{DType, FileFormat, write_tensor_file};
use plumb_report::{Block, Case, Cell, Document, Table, Tone, Verdict};

use crate::args::{DTypeArg, GradArgs};
use crate::inputs::{WeightsSource, check_output, load_graph_kept, output_format};
use crate::output::{Settings, num, shape};

pub fn run(args: &GradArgs, settings: &Settings) -> Result<Verdict> {
    let inputs = &args.inputs;
    // Check the output before the work, so a refused path costs nothing.
    let out_format = match &args.output {
        Some(path) => {
            let mut ins: Vec<&Path> = vec![&inputs.net];
            ins.extend(inputs.weights.as_deref());
            ins.extend(inputs.data.as_deref());
            check_output(path, settings.force, &ins)?;
            Some(output_format(path)?)
        }
        None => None,
    };
    let (loaded, network) = load_graph_kept(inputs, settings.seed)?;
    let precision = super::check::precision(args.precision);
    let mut computed = graph_gradient_report(&loaded, args.input_gradient, precision)?;
    let weights_source = loaded.weights_source;
    if let (Some(path), Some(format)) = (&args.output, out_format) {
        if format == FileFormat::Npy && computed.tensors.len() != 1 {
            bail!(
                "{}: a .npy file holds one tensor, but this gradient has {}; use .npz or .safetensors",
                path.display(),
                computed.tensors.len()
            );
        }
        let dtype = match args.dtype {
            Some(DTypeArg::F32) => DType::F32,
            Some(DTypeArg::F64) => DType::F64,
            None if precision == Precision::F32 => DType::F32,
            None => crate::inputs::gradient_dtype(&weights_source),
        };
        write_tensor_file(path, format, &computed.tensors, dtype, settings.existing())?;
        computed.report.output = Some(path.clone());
        settings.note(&format!(
            "wrote the gradient ({} tensors, {}) to {}",
            computed.tensors.len(),
            dtype.name(),
            path.display()
        ));
    }
    let mut doc = document(&computed.report);
    doc.command = "grad".into();
    doc.network = Some(network);
    doc.cases = computed
        .report
        .tensors
        .iter()
        .map(|t| {
            let c = Case::new(format!("gradient {}", t.name), t.norm.is_finite())
                .about(&t.name)
                .figure("norm", t.norm);
            if t.norm.is_finite() {
                c
            } else {
                c.failing(
                    "non-finite-gradient",
                    "the gradient holds NaN or infinite entries",
                )
            }
        })
        .collect();
    settings.emit(&computed.report, doc)
}

/// The human form of the report.
pub fn document(r: &GradReport) -> Document {
    let mut doc = Document::new("plumb grad — reference loss and gradient");
    let weights = match &r.weights {
        WeightsSource::File {
            path,
            format,
            dtype,
        } => format!("{} ({format}, {dtype})", path.display()),
        w => w.describe(),
    };
    let mut facts = vec![
        (
            "description".to_string(),
            r.description.display().to_string(),
        ),
        ("weights".to_string(), weights),
        ("data".to_string(), r.data.describe()),
    ];
    if r.precision != "f64" {
        facts.push((
            "arithmetic".to_string(),
            format!("{} (a reference to trust is computed in f64)", r.precision),
        ));
    }
    facts.extend([
        ("loss J".to_string(), format!("{:.12}", r.loss)),
        ("  data term".to_string(), format!("{:.12}", r.data_loss)),
        ("  L2 term".to_string(), format!("{:.12}", r.l2_term)),
    ]);
    if let Some(o) = &r.output {
        facts.push(("written to".to_string(), o.display().to_string()));
    }
    doc.push(Block::Facts(facts));
    let mut t = Table::new(["layer", "tensor", "shape", "‖g‖₂", "max |g|", "at"]);
    for s in &r.tensors {
        let tone = if s.norm.is_finite() {
            Tone::Plain
        } else {
            Tone::Bad
        };
        t.push([
            Cell::from(s.layer.to_string()),
            Cell::from(s.name.clone()),
            Cell::from(shape(&s.shape)),
            Cell::new(num(s.norm), tone),
            Cell::new(num(s.max_abs), tone),
            Cell::from(format!(
                "({})",
                s.max_at
                    .iter()
                    .map(usize::to_string)
                    .collect::<Vec<_>>()
                    .join(", ")
            )),
        ]);
    }
    // The parameters' gradient: the input's (layer 0), when given, is not part of it.
    let total = r
        .tensors
        .iter()
        .filter(|s| s.layer > 0)
        .map(|s| s.norm * s.norm)
        .sum::<f64>()
        .sqrt();
    t.footer([
        Cell::from("all"),
        "".into(),
        "".into(),
        Cell::from(num(total)),
        "".into(),
        "".into(),
    ]);
    doc.push(Block::Table(t));
    if !r.findings.is_empty() {
        doc.push(Block::Findings(r.findings.clone()));
    }
    let summary = if r.verdict == Verdict::Pass {
        "loss and gradient are finite".to_string()
    } else {
        "the loss or gradient is not finite".to_string()
    };
    doc.push(Block::Verdict(r.verdict, summary));
    doc
}
