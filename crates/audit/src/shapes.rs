//! The dimension audit's report types (expected against found per tensor and per layer, stray
//! tensors) and the file's tensors by name; the audit itself is graph_shapes.rs.

use std::collections::{BTreeSet, HashMap};

use plumb_engine::graph::Node;
use plumb_formats::{Tensor, TensorFile, shape_text};
use plumb_report::{Finding, Severity};
use serde::Serialize;

/// The state of one expected tensor.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Status {
    /// Present, floating point, of the expected shape.
    Ok,
    /// Not in the file under this name.
    Missing,
    /// Present with another shape.
    WrongShape,
    /// Present with the right shape but not floating point.
    NotFloat,
    /// No weight file was given.
    Unchecked,
}

/// One tensor the description expects, and what the file has under its name.
#[derive(Clone, Debug, Serialize)]
pub struct TensorShape {
    pub name: String,
    pub role: &'static str,
    pub expected: Vec<usize>,
    pub found: Option<Vec<usize>>,
    pub dtype: Option<&'static str>,
    pub status: Status,
}

/// One layer of the audit, of a dense description or of any kind.
#[derive(Clone, Debug, Serialize)]
pub struct LayerShapes {
    /// 1-based.
    pub layer: usize,
    #[serde(flatten)]
    pub terms: LayerTerms,
    pub parameters: usize,
    /// The file tensors of the layer (an augmented dense matrix is one).
    pub tensors: Vec<TensorShape>,
    /// `pass`, `fail`, or `unchecked` without a weight file.
    pub verdict: &'static str,
}

/// What a layer is, in its description's terms (docs/json.md): its name and kind and one
/// sample's shape going in and coming out; for a layer of a dense description also its fan-in,
/// units and activation, the fields the dense audit has always reported.
#[derive(Clone, Debug, Serialize)]
pub struct LayerTerms {
    pub name: String,
    pub kind: &'static str,
    pub input: String,
    pub output: String,
    #[serde(flatten)]
    pub dense: Option<DenseTerms>,
}

/// A dense layer in the terms of a dense description.
#[derive(Clone, Debug, Serialize)]
pub struct DenseTerms {
    pub inputs: usize,
    pub units: usize,
    pub activation: String,
}

impl LayerTerms {
    /// The terms of a node of the layer graph; `dense` for a description of dense layers only,
    /// whose layers are also shown as fan-in → units with their activation.
    pub fn of_node(node: &Node, dense: bool) -> LayerTerms {
        let (input, output) = (node.layer.input(), node.layer.output());
        let dense = dense.then(|| DenseTerms {
            inputs: input.size(),
            units: output.size(),
            activation: node.activation.to_string(),
        });
        LayerTerms {
            name: node.name.clone(),
            kind: node.layer.kind(),
            input: input.to_string(),
            output: output.to_string(),
            dense,
        }
    }

    /// `dense relu`, `conv2d`: what the layer is.
    pub fn kind(&self) -> String {
        match &self.dense {
            Some(d) => format!("dense {}", d.activation),
            None => self.kind.to_string(),
        }
    }

    /// `4 → 3`, `(3, 8, 8) → (6, 8, 8)`.
    pub fn in_out(&self) -> String {
        match &self.dense {
            Some(d) => format!("{} → {}", d.inputs, d.units),
            None => format!("{} → {}", self.input, self.output),
        }
    }

    /// The layer's name beside its number, except in a dense description (its layers are
    /// numbered, and named `layerJ` by default).
    pub fn name(&self) -> Option<&str> {
        match self.dense {
            Some(_) => None,
            None => Some(&self.name),
        }
    }
}

/// Unused tensors named one by one in findings, tables and test cases; the rest are counted.
pub const STRAY_LISTED: usize = 50;

/// A tensor in the file that no layer uses.
#[derive(Clone, Debug, Serialize)]
pub struct StrayTensor {
    pub name: String,
    pub shape: Vec<usize>,
    pub dtype: &'static str,
}

impl StrayTensor {
    /// The tensors of `file` whose names are not in `used` (what the layers took), in file order,
    /// read or listed from their headers alone.
    pub(crate) fn left_over(file: Option<&TensorFile>, used: &BTreeSet<&str>) -> Vec<StrayTensor> {
        file.map(|f| {
            f.listing()
                .filter(|(name, ..)| !used.contains(name))
                .map(|(name, shape, dtype)| StrayTensor {
                    name: name.to_string(),
                    shape: shape.to_vec(),
                    dtype: dtype.name(),
                })
                .collect()
        })
        .unwrap_or_default()
    }

    /// The findings for `stray`: one per tensor up to [`STRAY_LISTED`], then one for the rest, so
    /// that a file of 200,000 unused tensors does not make a report hundreds of times its size
    /// (the JSON report's `unexpected` list still names every one).
    pub(crate) fn findings(stray: &[StrayTensor], fix: &str) -> Vec<Finding> {
        let mut out: Vec<Finding> = stray
            .iter()
            .take(STRAY_LISTED)
            .map(|s| s.finding(fix))
            .collect();
        if stray.len() > STRAY_LISTED {
            out.push(Finding::new(
                "tensor-unexpected",
                Severity::Error,
                format!(
                    "{} more tensors are in the file that no layer of the description uses (the JSON report's `unexpected` list names them all); for each: {fix}",
                    stray.len() - STRAY_LISTED
                ),
            ));
        }
        out
    }

    /// The error finding that names this tensor; `fix` says how to make a layer use it.
    pub(crate) fn finding(&self, fix: &str) -> Finding {
        Finding::new(
            "tensor-unexpected",
            Severity::Error,
            format!(
                "{} {} is in the file, but no layer of the description uses it: {fix}",
                shape_text(&self.shape),
                self.dtype
            ),
        )
        .tensor(&self.name)
    }
}

/// The file's tensors by name (the first of a name, as `TensorFile::get` finds it): one lookup
/// per expected tensor instead of a scan of the file, which may hold 100,000 tensors.
pub(crate) fn by_name(file: &TensorFile) -> HashMap<&str, &Tensor> {
    file.tensors
        .iter()
        .rev()
        .map(|t| (t.name.as_str(), t))
        .collect()
}
