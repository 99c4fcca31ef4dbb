//! What the demo does with a network of the layer graph (scenarios (b) and (c)): train it on the
//! invented batch, then run on it what `shapes`, `grad`, `check`, `compare` and `audit` run, through
//! the same library calls, so that the files `--write` leaves replay to the same verdicts.
//!
//! The "hand-written" gradient with a bug is the reference engine's with one catalogued mistake
//! planted in one layer (`Graph::plant`): plumb plants it to stand in for someone's own code.

use std::path::{Path, PathBuf};

use anyhow::{Context, Result};
use ndarray::ArrayD;
use plumb_audit::{
    Audit, GraphShapeAudit, KindThresholds, Thresholds, audit_graph_file, audit_graph_shapes,
};
use plumb_diagnose::report::{CompareReport, compare_graph_report};
use plumb_engine::{Batch, Init, Rng};
use plumb_fd::report::{GraphCheckReport, GraphLoaded, graph_check_report};
use plumb_fd::{CheckConfig, Method, Precision};
use plumb_formats::{AxisOrder, FileFormat, GraphDescription, Tensor, TensorFile};
use plumb_probe::ProbeReport;
use plumb_report::{Block, DataSource, Verdict, WeightsSource};
use serde::Serialize;

use crate::commands::grad::GradReport;
use crate::commands::shapes::{self, ShapesReport};
use crate::commands::{check, compare, probe};
use crate::output::SCHEMA_VERSION;
use crate::output::Settings;

/// A catalogued mistake the demo plants in one layer of its "hand-written" gradient.
#[derive(Clone, Copy)]
pub struct Bug {
    pub code: &'static str,
    /// The layer's name in the description.
    pub layer: &'static str,
    /// What the mistake does, in a few words.
    pub label: &'static str,
}

/// A scenario on the layer graph: its description, invented batch, the bug and how to train it.
pub struct Scenario {
    /// The files' common name: `{stem}.toml`, `{stem}-weights.npz`, `{stem}-data.npz`,
    /// `{stem}-grad-planted.npz`.
    pub stem: &'static str,
    pub description: &'static str,
    pub batch: Batch,
    pub bug: Bug,
    /// Draws the initial weights.
    pub seed: u64,
    /// Gradient-descent steps and their rate.
    pub steps: usize,
    pub rate: f64,
    /// The hand-written NumPy program of this network in examples/, and the `--plant` argument
    /// that plants a bug in it.
    pub example: &'static str,
    pub plant: fn(&Bug) -> String,
}

/// What the demo found on a scenario, and the files that replay it.
pub struct Outcome {
    pub loaded: GraphLoaded,
    pub bug: Bug,
    pub net: PathBuf,
    pub weights_path: PathBuf,
    pub data_path: PathBuf,
    pub planted_path: PathBuf,
    pub weights: TensorFile,
    pub data: Vec<Tensor>,
    pub planted: TensorFile,
    pub description: &'static str,
    pub loss_before: f64,
    pub loss_after: f64,
    pub shapes: GraphShapeAudit,
    pub grad: GradReport,
    pub check: GraphCheckReport,
    pub compare: CompareReport,
    /// The release audit, for the scenarios that show it.
    pub audit: Option<Audit>,
    pub example: &'static str,
    /// The `--plant` argument of the example for the bug.
    pub plant: String,
    /// The example probed with the bug planted, when it could be run.
    pub probe: Option<ProbeReport>,
}

/// The planted bug of a scenario's "hand-written" gradient and the `compare` report on it.
#[derive(Serialize)]
pub struct PlantedGraphReport<'a> {
    pub code: &'static str,
    pub layer: &'static str,
    pub compare: &'a CompareReport,
}

/// The JSON of one graph scenario inside the demo's report (docs/json.md).
#[derive(Serialize)]
pub struct ScenarioReport<'a> {
    pub verdict: Verdict,
    pub scenario: &'static str,
    pub loss_before: f64,
    pub loss_after: f64,
    pub shapes: ShapesReport<'a, GraphShapeAudit>,
    pub grad: &'a GradReport,
    pub check: &'a GraphCheckReport,
    pub planted: PlantedGraphReport<'a>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub audit: Option<&'a Audit>,
    /// The NumPy example probed with the same bug (null without python3 and NumPy or the
    /// checkout).
    pub probe: Option<&'a ProbeReport>,
}

impl Scenario {
    /// Trains the network and runs every command's library call on it; `audit` adds the release
    /// audit of the trained weights.
    pub fn run(self, audit: bool, seed: u64) -> Result<Outcome> {
        let net = PathBuf::from(format!("{}.toml", self.stem));
        let weights_path = PathBuf::from(format!("{}-weights.npz", self.stem));
        let data_path = PathBuf::from(format!("{}-data.npz", self.stem));
        let planted_path = PathBuf::from(format!("{}-grad-planted.npz", self.stem));
        let desc = GraphDescription::parse(&net, self.description)
            .context("the demo's description is valid")?;
        let graph = &desc.graph;
        let b = &self.batch;
        let mut params = Init::GlorotUniform.graph_params(graph, &mut Rng::new(self.seed));
        let loss_before = graph.loss(&params, b.x.view(), b.y.view());
        for _ in 0..self.steps {
            let (_, g) = graph.parameter_gradient(&params, b.x.view(), b.y.view(), None);
            for (p, d) in params.iter_mut().zip(&g) {
                p.scaled_add(-self.rate, d);
            }
        }
        let loss_after = graph.loss(&params, b.x.view(), b.y.view());

        let weights = TensorFile {
            format: FileFormat::Npz,
            unread: Vec::new(),
            tensors: desc.to_file(&params)?,
        };
        let data = data_tensors(&desc, b);
        let bug = self.bug;
        let plant = (self.plant)(&bug);
        let planted = graph.plant(bug.layer, bug.code)?;
        let wrong = graph.gradient(&params, b.x.view(), b.y.view(), Some(&planted));
        let planted = TensorFile {
            format: FileFormat::Npz,
            unread: Vec::new(),
            tensors: desc.to_file(&wrong.params)?,
        };

        let samples = b.len();
        let shapes = audit_graph_shapes(&desc, Some(&weights));
        let audit = if audit {
            Some(audit_graph_file(
                &desc,
                &weights,
                &weights_path,
                b,
                None,
                &Thresholds::default(),
                &KindThresholds::default(),
                seed,
            )?)
        } else {
            None
        };
        let loaded = GraphLoaded {
            params: desc.read_params(&weights, &weights_path)?,
            description_hash: plumb_fd::report::description_hash(&desc),
            desc,
            weights_source: WeightsSource::File {
                path: weights_path.clone(),
                format: FileFormat::Npz.name().into(),
                dtype: "float64".into(),
            },
            batch: self.batch,
            data_source: DataSource::File {
                path: data_path.clone(),
                samples,
            },
            order: AxisOrder::ChannelsFirst,
        };
        let grad = plumb_fd::report::graph_gradient_report(&loaded, false, Precision::F64)?.report;
        let mut config = CheckConfig::new(Method::Central, Precision::F64);
        config.seed = seed;
        let check = graph_check_report(&loaded, &config, 3, &|_, _| {})?;
        let compare =
            compare_graph_report(&loaded, &planted_path, planted.clone(), "", None, seed)?;
        Ok(Outcome {
            loaded,
            bug,
            net,
            weights_path,
            data_path,
            planted_path,
            weights,
            data,
            planted,
            description: self.description,
            loss_before,
            loss_after,
            shapes,
            grad,
            check,
            compare,
            audit,
            example: self.example,
            plant,
            probe: None,
        })
    }
}

/// The batch as a data file holds it: x of shape (m, *input), y one-hot of shape (m, *output).
fn data_tensors(desc: &GraphDescription, b: &Batch) -> Vec<Tensor> {
    let tensor = |name: &str, values: &ndarray::Array2<f64>, dims: Vec<usize>| {
        let mut shape = vec![b.len()];
        shape.extend(dims);
        let array = ArrayD::from_shape_vec(shape.clone(), values.iter().copied().collect())
            .expect("a batch row holds one sample of the shape");
        Tensor {
            name: name.into(),
            shape,
            dtype: plumb_formats::DType::F64,
            data: array.iter().copied().collect(),
        }
    };
    vec![
        tensor("x", &b.x, desc.graph.input().dims()),
        tensor("y", &b.y, desc.graph.output().dims()),
    ]
}

impl Outcome {
    /// Probes the scenario's NumPy example with the bug planted, as `plumb probe` would.
    pub fn probe_example(&mut self, settings: &Settings) {
        self.probe = super::probe_example(
            plumb_probe::Source::Graph(&self.loaded),
            self.example,
            &self.plant,
            true,
            settings,
        );
    }

    /// The wrong tensors of the planted gradient, each explained by the planted code.
    pub fn named(&self) -> bool {
        let wrong: Vec<_> = self
            .compare
            .tensors
            .iter()
            .filter(|t| t.verdict == Verdict::Fail)
            .collect();
        !wrong.is_empty()
            && wrong.iter().all(|t| {
                t.diagnosis
                    .as_ref()
                    .is_some_and(|d| d.code == self.bug.code)
            })
    }

    /// Everything held: the weights fit, the gradient is finite, the check passed, the planted bug
    /// was named, and the audit (when run) passed.
    pub fn ok(&self) -> bool {
        self.shapes.verdict == Verdict::Pass
            && self.grad.verdict == Verdict::Pass
            && self.check.verdict == Verdict::Pass
            && self.named()
            && self
                .audit
                .as_ref()
                .is_none_or(|a| a.verdict == Verdict::Pass)
    }

    pub fn report(&self, scenario: &'static str) -> ScenarioReport<'_> {
        ScenarioReport {
            verdict: if self.ok() {
                Verdict::Pass
            } else {
                Verdict::Fail
            },
            scenario,
            loss_before: self.loss_before,
            loss_after: self.loss_after,
            shapes: ShapesReport {
                verdict: self.shapes.verdict,
                schema_version: SCHEMA_VERSION,
                command: "shapes",
                description: &self.net,
                weights: Some(&self.weights_path),
                audit: &self.shapes,
            },
            grad: &self.grad,
            check: &self.check,
            planted: PlantedGraphReport {
                code: self.bug.code,
                layer: self.bug.layer,
                compare: &self.compare,
            },
            audit: self.audit.as_ref(),
            probe: self.probe.as_ref(),
        }
    }

    /// The report's blocks: the shapes, the loss, the check's table, the planted bug named, and
    /// the audit when it ran.
    pub fn blocks(&self) -> Vec<Block> {
        let desc = &self.loaded.desc;
        let mut out = Vec::new();
        out.push(Block::Text(format!(
            "`plumb shapes` on the exported weights ({} parameters in {} file tensors, declared \
             storage): every layer's shapes in and out, per sample.",
            desc.graph.parameters(),
            desc.files.len()
        )));
        let sd = shapes::graph_document(
            desc,
            &self.net,
            Some((&self.weights_path, &self.weights)),
            &self.shapes,
        );
        out.extend(
            sd.blocks
                .into_iter()
                .filter(|b| matches!(b, Block::Table(_))),
        );
        let g = &self.grad;
        out.push(Block::Text(format!(
            "`plumb grad`: loss J = {:.6} (data term {:.6}, L2 term {:.6}) on {} invented samples. \
             `plumb check` then compares every parameter's gradient with central differences on \
             the layer graph, plus random directions over every tensor:",
            g.loss, g.data_loss, g.l2_term, g.samples
        )));
        let worst = Block::Table(check::graph_worst_table(&self.check.worst));
        let cd = check::document(&self.check, worst);
        if let Some(t) = cd.blocks.into_iter().find(|b| matches!(b, Block::Table(_))) {
            out.push(t);
        }
        out.push(Block::Text(format!(
            "The \"hand-written\" backward pass with a bug: {} ({}). The bug is planted by plumb \
             (the reference engine with that one mistake, `{}`) to stand in for someone's own \
             code. `plumb compare` names it:",
            self.bug.label, self.bug.layer, self.bug.code
        )));
        out.push(Block::Table(compare::tensor_table(&self.compare.tensors)));
        out.push(Block::Findings(self.compare.findings.clone()));
        match &self.probe {
            Some(r) => {
                out.push(Block::Text(format!(
                    "The same bug planted in a real program — {} --plant {}, a hand-written NumPy \
                     backward pass talking to plumb over its wire protocol — and what `plumb probe` \
                     finds: its gradient against differences of its own loss (at {} coordinates \
                     and one direction per tensor), its loss and its whole gradient against the \
                     reference:",
                    self.example,
                    self.plant,
                    super::THIN_SAMPLE
                )));
                let config = desc.graph.loss_config();
                let doc = probe::document_with(r, Some((config.loss.to_string(), config.l2 > 0.0)));
                out.extend(
                    doc.blocks
                        .into_iter()
                        .filter(|b| matches!(b, Block::Table(_))),
                );
            }
            None => out.push(Block::Text(format!(
                "(Run the demo from a checkout of the repository with python3 and NumPy installed \
                 to see `plumb probe` drive {} with the same bug planted.)",
                self.example
            ))),
        }
        if let Some(a) = &self.audit {
            out.push(Block::Text(
                "`plumb audit` on the trained weights: values, duplicate units, health on the \
                 invented data (including the gates), initialisation and gradient flow."
                    .into(),
            ));
            out.extend(a.sections());
            out.push(Block::Findings(a.findings.clone()));
        }
        out
    }
}

/// Where an outcome's files go in `dir`.
pub fn file_names(o: &Outcome) -> [&Path; 4] {
    [&o.net, &o.weights_path, &o.data_path, &o.planted_path]
}
