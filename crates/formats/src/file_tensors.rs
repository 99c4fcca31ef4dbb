//! The tensors of a weight file against the graph's tensors (DESIGN §4.3): which file tensor holds
//! which graph tensor, in which axis order, and the conversions both ways — a file's tensors into
//! the graph's canonical arrays, and canonical arrays (parameters or gradients) back into file
//! tensors in the declared storage.

use std::collections::{HashMap, HashSet};
use std::path::Path;

use ndarray::{Array1, Array2, ArrayD, ArrayView2, Ix1, Ix2, IxDyn};
use plumb_engine::graph::{Dense, Graph, GraphError, Role, Shape, Storage};

use crate::settings::{KindSettings, LayerSettings};
use crate::tensor::shape_text;
use crate::{
    AxisOrder, DType, FileFormat, GraphDescription, Layout, Tensor, TensorFile, TensorFileError,
};

/// The name a gradient file gives the input gradient (DESIGN §5); no parameter may take it.
pub const INPUT_GRADIENT: &str = "input";

/// How a file tensor lays out what it holds.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum FileStorage {
    /// One graph tensor, its axes in this order (the canonical one when
    /// [`Storage::is_canonical`]).
    Axes(Storage),
    /// A dense layer's weight and bias in one units × (fan-in + 1) matrix, the bias in column 0.
    Augmented,
}

impl FileStorage {
    /// The storage as a description declares it: axis letters, or "augmented".
    pub fn letters(&self) -> &str {
        match self {
            FileStorage::Axes(s) => s.letters(),
            FileStorage::Augmented => "augmented",
        }
    }
}

/// One tensor of the weight file as the description implies it.
#[derive(Clone, Debug, PartialEq)]
pub struct FileTensor {
    /// Its name in the file.
    pub name: String,
    /// Its shape in the file's axis order.
    pub shape: Vec<usize>,
    pub storage: FileStorage,
    /// The graph tensors it holds ([`Graph::tensors`] indices): one, or a dense layer's weight
    /// and bias under [`FileStorage::Augmented`].
    pub tensors: Vec<usize>,
    /// The layer (0-based).
    pub layer: usize,
    /// What it holds (an augmented matrix: the weight, with its bias).
    pub role: Role,
}

impl FileTensor {
    /// "weight", "bias", "scale", "shift", "table", or "augmented".
    pub fn role_name(&self) -> &'static str {
        if self.storage == FileStorage::Augmented {
            return "augmented";
        }
        match self.role {
            Role::Weight => "weight",
            Role::Bias => "bias",
            Role::Scale => "scale",
            Role::Shift => "shift",
            Role::Table => "table",
        }
    }

    /// Whether `found` is an acceptable shape: exact, or for a vector of n (a bias, a scale), also
    /// a 1 × n or n × 1 matrix.
    pub fn fits(&self, found: &[usize]) -> bool {
        self.shape == found
            || (self.shape.len() == 1
                && found.len() == 2
                && found.contains(&1)
                && found[0] * found[1] == self.shape[0])
    }
}

/// Canonical letters of a tensor that has no declared storage (for messages only).
fn canonical_letters(role: Role, ndim: usize) -> &'static str {
    match (role, ndim) {
        (Role::Table, 2) => "vs",
        (_, 1) => "o",
        (_, 2) => "oi",
        (_, 3) => "oik",
        _ => "oihw",
    }
}

/// The file tensors of a built graph, in layer order.
pub(crate) fn file_tensors(
    graph: &Graph,
    layers: &[LayerSettings],
    layout: Layout,
) -> Vec<FileTensor> {
    let specs = graph.tensors();
    let mut out = Vec::with_capacity(specs.len());
    for (j, (node, settings)) in graph.nodes().iter().zip(layers).enumerate() {
        let range = node.tensors();
        let one = |t: usize, name: String, storage: Storage| FileTensor {
            name,
            shape: storage.file_shape(&specs[t].spec.shape),
            storage: FileStorage::Axes(storage),
            tensors: vec![t],
            layer: j,
            role: specs[t].spec.role,
        };
        let plain = |t: usize| {
            let spec = &specs[t].spec;
            one(
                t,
                specs[t].name.clone(),
                Storage::canonical(canonical_letters(spec.role, spec.shape.len())),
            )
        };
        match &settings.kind {
            KindSettings::Dense { weight, bias, .. } => {
                let (w, b) = (range.start, range.start + 1);
                let shape = &specs[w].spec.shape;
                match layout {
                    Layout::Augmented => out.push(FileTensor {
                        name: weight.clone().unwrap_or_else(|| node.name.clone()),
                        shape: vec![shape[0], shape[1] + 1],
                        storage: FileStorage::Augmented,
                        tensors: vec![w, b],
                        layer: j,
                        role: Role::Weight,
                    }),
                    Layout::Split | Layout::SplitTransposed => {
                        let letters = if layout == Layout::Split { "oi" } else { "io" };
                        let storage = Storage::parse(letters, "oi").expect("a permutation of oi");
                        let name = weight.clone().unwrap_or_else(|| specs[w].name.clone());
                        out.push(one(w, name, storage));
                        let name = bias.clone().unwrap_or_else(|| specs[b].name.clone());
                        out.push(one(b, name, Storage::canonical("o")));
                    }
                }
            }
            KindSettings::Conv { storage, .. } => {
                out.push(one(
                    range.start,
                    specs[range.start].name.clone(),
                    storage.clone(),
                ));
                out.extend((range.start + 1..range.end).map(plain));
            }
            KindSettings::Rnn { transposed, .. }
            | KindSettings::Lstm { transposed, .. }
            | KindSettings::Gru { transposed, .. }
            | KindSettings::Attention { transposed, .. } => {
                for t in range {
                    if *transposed && specs[t].spec.role == Role::Weight {
                        let storage = Storage::parse("io", "oi").expect("a permutation of oi");
                        out.push(one(t, specs[t].name.clone(), storage));
                    } else {
                        out.push(plain(t));
                    }
                }
            }
            _ => out.extend(range.map(plain)),
        }
    }
    out
}

/// A weight file that does not fit its description.
#[derive(Clone, Debug, thiserror::Error, PartialEq)]
#[error("{}: tensor `{tensor}`: {message}", path.display())]
pub struct LayoutError {
    pub path: std::path::PathBuf,
    pub tensor: String,
    pub message: String,
}

impl GraphDescription {
    /// The names a weight file's tensors may have for this description to use them: its file
    /// tensors' names, and its dense layers' under every other layout (a dimension audit knows
    /// a file stored in another layout by them).
    pub fn weight_names(&self) -> HashSet<String> {
        let mut names: HashSet<String> = self.files.iter().map(|f| f.name.clone()).collect();
        let dense = |l: &LayerSettings| matches!(l.kind, KindSettings::Dense { .. });
        if self.layers.iter().any(dense) {
            for layout in Layout::ALL.into_iter().filter(|&l| l != self.layout) {
                let files = file_tensors(&self.graph, &self.layers, layout);
                names.extend(files.into_iter().map(|f| f.name));
            }
        }
        names
    }

    /// The weight file at `path`, its tensors of [`GraphDescription::weight_names`] read and any
    /// other listed from its header alone ([`crate::read_tensors_for`]): a stray archive member
    /// costs its header, whatever it would inflate to.
    pub fn read_weights(&self, path: &Path) -> Result<TensorFile, TensorFileError> {
        let names = self.weight_names();
        crate::read_tensors_for(path, &|name| names.contains(name))
    }

    /// The file's tensors as the graph's parameters, canonical shapes, in [`Graph::tensors`]
    /// order. `path` is the weight file, for messages. Tensors the description does not use are
    /// ignored here (a shapes audit reports them).
    pub fn read_params(
        &self,
        file: &TensorFile,
        path: &Path,
    ) -> Result<Vec<ArrayD<f64>>, LayoutError> {
        let err = |tensor: &str, message: String| LayoutError {
            path: path.to_path_buf(),
            tensor: tensor.to_string(),
            message,
        };
        // A `.npy` holds one tensor, named after the file: when one is expected, it is that one.
        let single =
            file.format == FileFormat::Npy && file.tensors.len() == 1 && self.files.len() == 1;
        let index: HashMap<&str, &Tensor> = file
            .tensors
            .iter()
            .rev()
            .map(|t| (t.name.as_str(), t))
            .collect();
        let specs = self.graph.tensors();
        let mut params: Vec<Option<ArrayD<f64>>> = vec![None; specs.len()];
        for f in &self.files {
            let layer = f.layer + 1;
            let kind = self.layers[f.layer].kind_name();
            let stored = match &f.storage {
                FileStorage::Axes(s) if s.is_canonical() => String::new(),
                storage => format!(" (storage \"{}\" declared)", storage.letters()),
            };
            let found = if single {
                Some(&file.tensors[0])
            } else {
                index.get(f.name.as_str()).copied()
            };
            let Some(t) = found else {
                return Err(err(
                    &f.name,
                    format!(
                        "missing: layer {layer} ({kind}) needs its {} as {}{stored}, and the file does not hold it; run `plumb shapes` for a diagnosis",
                        f.role_name(),
                        shape_text(&f.shape)
                    ),
                ));
            };
            if !t.dtype.is_float() {
                return Err(err(
                    &f.name,
                    format!(
                        "holds {} values; weights must be floating point (f16, bf16, f32 or f64)",
                        t.dtype.name()
                    ),
                ));
            }
            if !f.fits(&t.shape) {
                return Err(err(
                    &f.name,
                    format!(
                        "has shape {}, but layer {layer} ({kind}) needs {} in the file's axis order{stored}; run `plumb shapes` for a diagnosis",
                        shape_text(&t.shape),
                        shape_text(&f.shape)
                    ),
                ));
            }
            let array = ArrayD::from_shape_vec(IxDyn(&f.shape), t.data.clone())
                .expect("the shape fits the data");
            match &f.storage {
                FileStorage::Axes(s) => params[f.tensors[0]] = Some(s.to_canonical(&array)),
                FileStorage::Augmented => {
                    let matrix = array.into_dimensionality::<Ix2>().expect("two axes");
                    let (w, b) = Dense::split(&matrix);
                    params[f.tensors[0]] = Some(w.into_dyn());
                    params[f.tensors[1]] = Some(b.into_dyn());
                }
            }
        }
        Ok(params
            .into_iter()
            .map(|p| p.expect("every graph tensor is held by one file tensor"))
            .collect())
    }

    /// Canonical arrays (parameters or gradients, as [`Graph::check_params`] accepts them) as the
    /// file's tensors in the declared storage, named as the description names them, float64.
    pub fn to_file(&self, arrays: &[ArrayD<f64>]) -> Result<Vec<Tensor>, GraphError> {
        self.graph.check_params(arrays)?;
        Ok(self
            .files
            .iter()
            .map(|f| {
                let values = match &f.storage {
                    FileStorage::Axes(s) => s.to_file(&arrays[f.tensors[0]]),
                    FileStorage::Augmented => {
                        let w: Array2<f64> = arrays[f.tensors[0]]
                            .clone()
                            .into_dimensionality::<Ix2>()
                            .expect("a dense weight has two axes");
                        let b: Array1<f64> = arrays[f.tensors[1]]
                            .clone()
                            .into_dimensionality::<Ix1>()
                            .expect("a dense bias has one axis");
                        Dense::join(&w, &b).into_dyn()
                    }
                };
                Tensor {
                    name: f.name.clone(),
                    shape: values.shape().to_vec(),
                    dtype: DType::F64,
                    data: values.iter().copied().collect(),
                }
            })
            .collect())
    }

    /// The input gradient (m × input size, as [`plumb_engine::graph::Gradient::input`]) as the
    /// tensor `input` of shape (m, *input), float64.
    pub fn input_tensor(&self, input: ArrayView2<f64>) -> Tensor {
        let mut shape = vec![input.nrows()];
        shape.extend(self.graph.input().dims());
        Tensor {
            name: INPUT_GRADIENT.into(),
            shape,
            dtype: DType::F64,
            data: input.iter().copied().collect(),
        }
    }

    /// [`GraphDescription::input_tensor`] in a data file's axis order: channels-last moves a
    /// spatial input's channel axis to the end, as `--channels-last` data holds it.
    pub fn input_tensor_in(&self, input: ArrayView2<f64>, order: AxisOrder) -> Tensor {
        let t = self.input_tensor(input);
        let spatial = matches!(
            self.graph.input(),
            Shape::Signal { .. } | Shape::Image { .. }
        );
        if order == AxisOrder::ChannelsFirst || !spatial {
            return t;
        }
        let array = ArrayD::from_shape_vec(IxDyn(&t.shape), t.data).expect("the shape fits");
        let n = t.shape.len();
        let axes: Vec<usize> = std::iter::once(0).chain(2..n).chain([1]).collect();
        let moved = array.permuted_axes(IxDyn(&axes));
        Tensor {
            name: t.name,
            shape: moved.shape().to_vec(),
            dtype: t.dtype,
            data: moved.iter().copied().collect(),
        }
    }
}
