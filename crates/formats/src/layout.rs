//! How a weight file's tensors map to the engine's augmented matrices, under each layout.

use std::path::{Path, PathBuf};

use ndarray::{Array2, s};
use plumb_engine::Weights;
use thiserror::Error;

use crate::tensor::shape_text;
use crate::{DType, Description, Layout, Tensor, TensorFile};

/// What part of a layer a tensor holds.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Role {
    /// Weights and bias together, bias in column 0.
    Augmented,
    /// The weight matrix without the bias.
    Weight,
    /// The bias vector.
    Bias,
}

impl Role {
    pub fn name(&self) -> &'static str {
        match self {
            Role::Augmented => "augmented",
            Role::Weight => "weight",
            Role::Bias => "bias",
        }
    }
}

/// A tensor a layout expects in the weight file.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct ExpectedTensor {
    /// 0-based layer index.
    pub layer: usize,
    pub role: Role,
    pub name: String,
    pub shape: Vec<usize>,
}

/// A weight file that does not fit its description.
#[derive(Clone, Debug, Error, PartialEq)]
#[error("{}: tensor `{tensor}`: {message}", path.display())]
pub struct LayoutError {
    pub path: PathBuf,
    pub tensor: String,
    pub message: String,
}

/// The tensors a description implies under a layout (its own or another, to test a hypothesis),
/// in layer order, with explicit names from the description taking precedence over the defaults.
pub fn expected_tensors(desc: &Description, layout: Layout) -> Vec<ExpectedTensor> {
    let mut out = Vec::new();
    for (l, (spec, ld)) in desc.network.layers().iter().zip(&desc.layers).enumerate() {
        let j = l + 1;
        let (units, inputs) = (spec.units, spec.inputs);
        match layout {
            Layout::Augmented => out.push(ExpectedTensor {
                layer: l,
                role: Role::Augmented,
                name: ld.weight.clone().unwrap_or_else(|| format!("layer{j}")),
                shape: vec![units, inputs + 1],
            }),
            Layout::Split | Layout::SplitTransposed => {
                let shape = if layout == Layout::Split {
                    vec![units, inputs]
                } else {
                    vec![inputs, units]
                };
                out.push(ExpectedTensor {
                    layer: l,
                    role: Role::Weight,
                    name: ld
                        .weight
                        .clone()
                        .unwrap_or_else(|| format!("layer{j}.weight")),
                    shape,
                });
                out.push(ExpectedTensor {
                    layer: l,
                    role: Role::Bias,
                    name: ld.bias.clone().unwrap_or_else(|| format!("layer{j}.bias")),
                    shape: vec![units],
                });
            }
        }
    }
    out
}

/// Whether a found shape is acceptable for an expected one: exact, or, for a bias of n entries,
/// also a 1 × n or n × 1 matrix (a common way to store it).
pub fn shape_fits(role: Role, expected: &[usize], found: &[usize]) -> bool {
    if expected == found {
        return true;
    }
    role == Role::Bias
        && found.len() == 2
        && found.contains(&1)
        && found.iter().product::<usize>() == expected[0]
}

/// A `.npy` file holds one tensor, named after the file; when the layout expects exactly one
/// tensor, that is the one, whatever the file is called.
pub fn bind<'f>(desc: &Description, file: &'f TensorFile) -> std::borrow::Cow<'f, TensorFile> {
    let expected = expected_tensors(desc, desc.layout);
    match (file.format, file.tensors.as_slice(), expected.as_slice()) {
        (crate::FileFormat::Npy, [t], [e]) if t.name != e.name => {
            let mut renamed = file.clone();
            renamed.tensors[0].name = e.name.clone();
            std::borrow::Cow::Owned(renamed)
        }
        _ => std::borrow::Cow::Borrowed(file),
    }
}

/// The weights of a file as the engine's augmented matrices, under the description's layout.
/// Tensors the layout does not use are ignored here (`plumb shapes` reports them).
pub fn assemble(
    desc: &Description,
    file: &TensorFile,
    path: &Path,
) -> Result<Weights<f64>, LayoutError> {
    let bound = bind(desc, file);
    let file: &TensorFile = &bound;
    let err = |tensor: &str, message: String| LayoutError {
        path: path.to_path_buf(),
        tensor: tensor.to_string(),
        message,
    };
    let mut found = Vec::new();
    // By name, the first of a name as a scan would find it: one lookup per expected tensor.
    let index: std::collections::HashMap<&str, &crate::Tensor> = file
        .tensors
        .iter()
        .rev()
        .map(|t| (t.name.as_str(), t))
        .collect();
    for e in expected_tensors(desc, desc.layout) {
        let Some(&t) = index.get(e.name.as_str()) else {
            let names: Vec<String> = file
                .tensors
                .iter()
                .take(8)
                .map(|t| format!("`{}`", t.name))
                .collect();
            let more = if file.tensors.len() > 8 { ", …" } else { "" };
            return Err(err(
                &e.name,
                format!(
                    "missing: layer {} under layout `{}` needs it, and the file holds {}{more}; run `plumb shapes` for a diagnosis",
                    e.layer + 1,
                    desc.layout,
                    if names.is_empty() {
                        "no tensors".to_string()
                    } else {
                        names.join(", ")
                    }
                ),
            ));
        };
        if !t.dtype.is_float() {
            return Err(err(
                &e.name,
                format!(
                    "holds {} values; weights must be floating point (f16, bf16, f32 or f64)",
                    t.dtype.name()
                ),
            ));
        }
        if !shape_fits(e.role, &e.shape, &t.shape) {
            return Err(err(
                &e.name,
                format!(
                    "has shape {}, but layer {} under layout `{}` needs {}; run `plumb shapes` for a diagnosis",
                    shape_text(&t.shape),
                    e.layer + 1,
                    desc.layout,
                    shape_text(&e.shape)
                ),
            ));
        }
        found.push((e, t));
    }
    let mut layers = Vec::with_capacity(desc.layers.len());
    for spec in desc.network.layers() {
        layers.push(Array2::<f64>::zeros(spec.shape()));
    }
    for (e, t) in found {
        let theta = &mut layers[e.layer];
        match e.role {
            Role::Augmented => theta.assign(&matrix(t, e.shape[0], e.shape[1])),
            Role::Weight if desc.layout == Layout::SplitTransposed => theta
                .slice_mut(s![.., 1..])
                .assign(&matrix(t, e.shape[0], e.shape[1]).t()),
            Role::Weight => theta
                .slice_mut(s![.., 1..])
                .assign(&matrix(t, e.shape[0], e.shape[1])),
            Role::Bias => theta
                .column_mut(0)
                .assign(&ndarray::ArrayView1::from(&t.data[..])),
        }
    }
    Ok(Weights::new(layers))
}

/// Augmented matrices (weights or gradients) as the tensors of the description's layout, named as
/// it names them, in layer order: the inverse of [`assemble`].
pub fn disassemble(desc: &Description, weights: &Weights<f64>) -> Vec<Tensor> {
    expected_tensors(desc, desc.layout)
        .into_iter()
        .map(|e| {
            let theta = weights.layer(e.layer);
            let data: Vec<f64> = match e.role {
                Role::Augmented => theta.iter().copied().collect(),
                Role::Weight if desc.layout == Layout::SplitTransposed => {
                    theta.slice(s![.., 1..]).t().iter().copied().collect()
                }
                Role::Weight => theta.slice(s![.., 1..]).iter().copied().collect(),
                Role::Bias => theta.column(0).to_vec(),
            };
            Tensor {
                name: e.name,
                shape: e.shape,
                dtype: DType::F64,
                data,
            }
        })
        .collect()
}

fn matrix(t: &Tensor, rows: usize, cols: usize) -> Array2<f64> {
    Array2::from_shape_vec((rows, cols), t.data.clone()).expect("shape checked against the data")
}
