//! The report of `plumb probe` (docs/json.md): the program, the check against its own loss, and
//! its loss and gradient against the reference.

use std::path::PathBuf;

use plumb_diagnose::report::{Certification, LossReport, TensorReport};
use plumb_fd::Status;
use plumb_report::figure;
use plumb_report::{DataSource, Finding, Verdict, WeightsSource};
use serde::{Deserialize, Serialize};

/// The program probed: its command line, the name its hello gives and the type it computes in.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct ProgramReport {
    pub command: String,
    pub name: String,
    pub dtype: String,
}

/// The worst coordinate of a tensor in the self-check.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct SelfWorst {
    pub index: Vec<usize>,
    #[serde(deserialize_with = "figure")]
    pub gradient: f64,
    #[serde(deserialize_with = "figure")]
    pub differences: f64,
    #[serde(deserialize_with = "figure")]
    pub rel_error: f64,
    #[serde(deserialize_with = "figure")]
    pub bound: f64,
    pub status: Status,
}

/// One tensor of the self-check: the program's gradient against differences of its own loss.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct SelfTensor {
    pub name: String,
    pub verdict: Verdict,
    pub parameters: usize,
    pub checked: usize,
    #[serde(deserialize_with = "figure")]
    pub max_rel_error: f64,
    #[serde(deserialize_with = "figure")]
    pub median_rel_error: f64,
    pub mismatches: usize,
    pub unreliable: usize,
    /// Coordinates neither a match nor a mismatch (the method's bound exceeds a tenth of the value).
    pub unsettled: usize,
    pub directions: usize,
    pub direction_mismatches: usize,
    pub worst: Option<SelfWorst>,
}

/// The program's gradient against finite differences of its own loss.
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct SelfCheck {
    pub method: String,
    pub step_rule: String,
    #[serde(deserialize_with = "figure")]
    pub tolerance: f64,
    pub sample: String,
    pub checked: usize,
    pub parameters: usize,
    pub directions_per_tensor: usize,
    /// Whether enough was settled for a verdict (docs/json.md: the settled share).
    pub conclusive: bool,
    pub tensors: Vec<SelfTensor>,
}

/// The JSON report of `plumb probe` (docs/json.md).
#[derive(Clone, Debug, Serialize, Deserialize)]
pub struct ProbeReport {
    pub verdict: Verdict,
    pub schema_version: u32,
    pub command: String,
    pub program: ProgramReport,
    pub blackbox: bool,
    /// The network description; null for a black box probed without one.
    pub description: Option<PathBuf>,
    pub weights: WeightsSource,
    pub data: DataSource,
    pub self_check: SelfCheck,
    pub loss: Option<LossReport>,
    pub reference: Option<Certification>,
    pub tensors: Vec<TensorReport>,
    pub findings: Vec<Finding>,
}
