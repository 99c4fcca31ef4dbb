//! What a run of the layer graph is on — the counterpart of [`super::Loaded`] for descriptions of
//! any kind: the graph's parameters from a weight file (through the description's file tensors,
//! in their declared storage) or drawn from a seed, and a batch from a data file (in either axis
//! order) or drawn from a seed, each checked against the graph and plumb's memory budget.

use std::path::{Path, PathBuf};

use ndarray::ArrayD;
use plumb_engine::graph::Dense;
use plumb_engine::{Batch, Init, Loss, Rng};
use plumb_formats::{
    AxisOrder, DataError, GraphDescription, LayoutError, TensorFile, TensorFileError,
    read_graph_data, read_tensors,
};
use plumb_report::{DataSource, WeightsSource};

/// The largest synthetic batch, in values (2²⁶ = 512 MiB of f64), a guard against a typo; the
/// dense engine's figure.
pub const MAX_SYNTHETIC_VALUES: usize = 1 << 26;
/// The most activation values a forward pass may hold (2²⁷ = 1 GiB of f64); the dense engine's
/// figure.
pub const MAX_ACTIVATION_VALUES: usize = 1 << 27;

/// A graph run's description, parameters (canonical shapes, [`plumb_engine::graph::Graph::tensors`]
/// order) and batch, with where they came from.
pub struct GraphLoaded {
    pub desc: GraphDescription,
    pub params: Vec<ArrayD<f64>>,
    pub weights_source: WeightsSource,
    pub batch: Batch,
    pub data_source: DataSource,
    /// The axis order of the data file (channels-first for a synthetic batch).
    pub order: AxisOrder,
    /// The network's identity in reports (`description_hash`): [`graph_description_hash`], or
    /// for a dense description its dense hash ([`super::description_hash`], which covers its
    /// conventions), as baselines and shards have always named it.
    pub description_hash: String,
}

/// Where a graph run's weights and data come from.
pub struct GraphInputs<'a> {
    pub weights: Option<&'a Path>,
    pub data: Option<&'a Path>,
    pub order: AxisOrder,
    /// The scheme and seed of weights drawn without a file; the seed also draws a synthetic batch.
    pub init: Init,
    pub seed: u64,
    /// Samples of a synthetic batch.
    pub samples: usize,
}

/// Why a graph run's inputs cannot be used; each names the file and what to do.
#[derive(Debug, thiserror::Error)]
pub enum GraphLoadError {
    #[error(transparent)]
    Tensors(#[from] TensorFileError),
    #[error(transparent)]
    Layout(#[from] LayoutError),
    #[error(transparent)]
    Data(#[from] DataError),
    #[error("{}: {message}", path.display())]
    Input { path: PathBuf, message: String },
}

impl GraphLoaded {
    /// Loads the weights and the batch for `desc`.
    pub fn load(
        desc: GraphDescription,
        inputs: &GraphInputs,
    ) -> Result<GraphLoaded, GraphLoadError> {
        let (params, weights_source) = match inputs.weights {
            Some(path) => {
                let file = read_tensors(path)?;
                check_finite(&file, path)?;
                let params = desc.read_params(&file, path)?;
                let source = WeightsSource::File {
                    path: path.to_path_buf(),
                    format: file.format.name().into(),
                    dtype: widest_float(&file).into(),
                };
                (params, source)
            }
            None => (
                inputs
                    .init
                    .graph_params(&desc.graph, &mut Rng::new(inputs.seed)),
                WeightsSource::Init {
                    scheme: inputs.init.name().into(),
                    seed: inputs.seed,
                },
            ),
        };
        let graph = &desc.graph;
        let (batch, data_source, order) = match inputs.data {
            Some(path) => {
                let batch = read_graph_data(path, &graph.input(), &graph.output(), inputs.order)?;
                let samples = batch.len();
                let source = DataSource::File {
                    path: path.to_path_buf(),
                    samples,
                };
                (batch, source, inputs.order)
            }
            None => {
                let m = inputs.samples;
                let values = m.checked_mul(graph.input().size() + graph.output().size());
                if m == 0 || values.is_none_or(|v| v > MAX_SYNTHETIC_VALUES) {
                    return Err(GraphLoadError::Input {
                        path: desc.path.clone(),
                        message: format!(
                            "a synthetic batch of {m} samples for this network is empty or would draw more than {MAX_SYNTHETIC_VALUES} values; give --batch between 1 and a smaller number, or --data"
                        ),
                    });
                }
                let batch = Batch::graph_synthetic(graph, m, inputs.seed);
                let source = DataSource::Synthetic {
                    samples: m,
                    seed: inputs.seed,
                };
                (batch, source, AxisOrder::ChannelsFirst)
            }
        };
        let where_data = inputs.data.unwrap_or(&desc.path).to_path_buf();
        let bad = |message: String| GraphLoadError::Input {
            path: where_data.clone(),
            message,
        };
        graph
            .check_batch(batch.x.view(), batch.y.view())
            .map_err(|e| bad(format!("the data does not fit the network: {e}")))?;
        let per_sample: usize = graph.input().size()
            + graph
                .nodes()
                .iter()
                .map(|n| n.layer.output().size())
                .sum::<usize>();
        let values = batch.len().checked_mul(2 * per_sample);
        if values.is_none_or(|v| v > MAX_ACTIVATION_VALUES) {
            return Err(bad(format!(
                "a batch of {} samples through this network needs more than the {MAX_ACTIVATION_VALUES} activation values plumb holds; use fewer samples",
                batch.len()
            )));
        }
        if graph.loss_config().loss == Loss::CrossEntropy
            && let Some(((i, k), v)) = batch
                .y
                .indexed_iter()
                .find(|(_, v)| !(0.0..=1.0).contains(*v))
        {
            return Err(bad(format!(
                "sample {}, target {}: {v} is outside [0, 1]; cross-entropy needs targets between 0 and 1 (one-hot labels or probabilities) — use squared-error for other targets",
                i + 1,
                k + 1
            )));
        }
        Ok(GraphLoaded {
            description_hash: graph_description_hash(&desc),
            desc,
            params,
            weights_source,
            batch,
            data_source,
            order,
        })
    }
}

impl GraphLoaded {
    /// A dense description's run on its layer graph (`AnyDescription::Dense` carries both): the
    /// same weights, each augmented matrix split into the graph's weight and bias, and the same
    /// batch, sources and messages as the dense loading gave.
    pub fn from_dense(loaded: super::Loaded, desc: GraphDescription) -> GraphLoaded {
        let mut params = Vec::with_capacity(2 * loaded.weights.layers().len());
        for matrix in loaded.weights.layers() {
            let (w, b) = Dense::split(matrix);
            params.push(w.into_dyn());
            params.push(b.into_dyn());
        }
        GraphLoaded {
            description_hash: super::description_hash(&loaded.desc),
            desc,
            params,
            weights_source: loaded.weights_source,
            batch: loaded.batch,
            data_source: loaded.data_source,
            order: AxisOrder::ChannelsFirst,
        }
    }
}

/// Non-finite weights make every figure meaningless: the first one is named, by tensor and flat
/// index.
fn check_finite(file: &TensorFile, path: &Path) -> Result<(), GraphLoadError> {
    for t in &file.tensors {
        if let Some((k, v)) = t.data.iter().enumerate().find(|(_, v)| !v.is_finite()) {
            return Err(GraphLoadError::Input {
                path: path.to_path_buf(),
                message: format!(
                    "tensor `{}` holds {v} at flat index {k}; a loss or gradient of such weights means nothing — fix the export (byte order or dtype?) or the training run that produced it",
                    t.name
                ),
            });
        }
    }
    Ok(())
}

/// The widest floating-point type among a file's tensors (float64 if any, else the narrower).
pub fn widest_float(file: &TensorFile) -> &'static str {
    use plumb_formats::DType;
    let rank = |d: DType| match d {
        DType::F64 => 3,
        DType::F32 => 2,
        DType::F16 | DType::BF16 => 1,
        _ => 0,
    };
    file.tensors
        .iter()
        .map(|t| t.dtype)
        .max_by_key(|&d| rank(d))
        .map_or("float64", |d| d.name())
}

/// A graph network's identity, like [`super::description_hash`]: an FNV-1a hash (64 bits) of the
/// loss and its conventions, each layer's kind, name, settings (stride, padding, heads, gate
/// order…: what changes the function with the same shapes), output shape and activation, and
/// each file tensor's name, shape and storage. Line numbers and comments do not enter it.
pub fn graph_description_hash(desc: &GraphDescription) -> String {
    let mut text = format!(
        "input {}\n{:?}\n",
        desc.graph.input(),
        desc.graph.loss_config()
    );
    for (l, n) in desc.layers.iter().zip(desc.graph.nodes()) {
        text.push_str(&format!(
            "{} {} {:?} {} {:?}\n",
            l.kind_name(),
            n.name,
            l.kind,
            n.layer.output(),
            n.activation
        ));
    }
    for f in &desc.files {
        text.push_str(&format!(
            "{} {:?} {}\n",
            f.name,
            f.shape,
            f.storage.letters()
        ));
    }
    let hash = text.bytes().fold(0xcbf2_9ce4_8422_2325u64, |h, b| {
        (h ^ b as u64).wrapping_mul(0x0100_0000_01b3)
    });
    format!("{hash:016x}")
}
