//! What a run of the layer graph is on: the graph's parameters from a weight file (through the
//! description's file tensors, in their declared storage — a dense description's augmented,
//! split or split-transposed layout) or drawn from a seed, and a batch from a data file (CSV or
//! npz, in either axis order) or drawn from a seed, each checked against the graph and plumb's
//! memory budget, with messages that name the file and the place.

use std::path::{Path, PathBuf};

use ndarray::{Array2, ArrayD};
use plumb_engine::graph::{Graph, GraphError};
use plumb_engine::{Batch, Features, Init, Inputs, Loss, Rng};
use plumb_formats::{
    AxisOrder, DataError, GraphDescription, LayoutError, TensorFile, TensorFileError,
    archive_place, csv_place, read_graph_data, read_graph_data_kept,
};
use plumb_report::{DataSource, WeightsSource};

/// The largest synthetic batch, in values (2²⁶ = 512 MiB of f64), a guard against a typo.
pub const MAX_SYNTHETIC_VALUES: usize = 1 << 26;
/// The most activation values a forward pass may hold (2²⁷ = 1 GiB of f64).
pub const MAX_ACTIVATION_VALUES: usize = plumb_formats::MAX_BATCH_VALUES;

/// A graph run's description, parameters (canonical shapes, [`plumb_engine::graph::Graph::tensors`]
/// order) and batch, with where they came from. `X` holds the batch's x: f64 values, or
/// [`Features`] for `plumb grad` ([`GraphLoaded::load_kept`]).
pub struct GraphLoaded<X = Array2<f64>> {
    pub desc: GraphDescription,
    pub params: Vec<ArrayD<f64>>,
    pub weights_source: WeightsSource,
    pub batch: Batch<X>,
    pub data_source: DataSource,
    /// The axis order of the data file (channels-first for a synthetic batch).
    pub order: AxisOrder,
    /// The network's identity in reports (`description_hash`): [`description_hash`].
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

impl GraphInputs<'static> {
    /// No files: weights drawn by `init` from `seed`, a synthetic batch of `samples` drawn from
    /// the same seed (the data's axes need no order).
    pub fn drawn(init: Init, seed: u64, samples: usize) -> Self {
        GraphInputs {
            weights: None,
            data: None,
            order: AxisOrder::ChannelsFirst,
            init,
            seed,
            samples,
        }
    }
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
    /// A number of samples or targets that cannot be used (the message names the flag or place).
    #[error("{0}")]
    Usage(String),
    /// A weight file that does not fit the description, as the caller's vetting said.
    #[error("{0}")]
    Misfit(String),
}

/// A caller's verdict on a weight file before it is read into parameters: `Err` with the whole
/// message when it does not fit (the CLI's is a dense description's dimension audit).
pub type Vet<'a> = &'a dyn Fn(&GraphDescription, &TensorFile, &Path) -> Result<(), String>;

impl GraphLoaded {
    /// Loads the weights and the batch for `desc`.
    pub fn load(
        desc: GraphDescription,
        inputs: &GraphInputs,
    ) -> Result<GraphLoaded, GraphLoadError> {
        GraphLoaded::load_vetted(desc, inputs, &|_, _, _| Ok(()))
    }

    /// [`GraphLoaded::load`], with the weight file first put to `vet`.
    pub fn load_vetted(
        desc: GraphDescription,
        inputs: &GraphInputs,
        vet: Vet,
    ) -> Result<GraphLoaded, GraphLoadError> {
        GraphLoaded::load_with(desc, inputs, vet)
    }
}

impl GraphLoaded<Features> {
    /// [`GraphLoaded::load_vetted`], with a data file's flat f32 x kept in f32
    /// ([`read_graph_data_kept`]) for the whole-batch gradient; the same checks and messages.
    pub fn load_kept(
        desc: GraphDescription,
        inputs: &GraphInputs,
        vet: Vet,
    ) -> Result<GraphLoaded<Features>, GraphLoadError> {
        GraphLoaded::load_with(desc, inputs, vet)
    }
}

/// How a loaded batch's x is read, drawn and checked.
pub trait LoadedX: Sized {
    fn read(path: &Path, graph: &Graph, order: AxisOrder) -> Result<Batch<Self>, DataError>;
    fn drawn(batch: Batch) -> Batch<Self>;
    fn check(graph: &Graph, batch: &Batch<Self>) -> Result<(), GraphError>;
    fn samples(batch: &Batch<Self>) -> usize;
}

impl LoadedX for Array2<f64> {
    fn read(path: &Path, graph: &Graph, order: AxisOrder) -> Result<Batch, DataError> {
        read_graph_data(path, &graph.input(), &graph.output(), order)
    }
    fn drawn(batch: Batch) -> Batch {
        batch
    }
    fn check(graph: &Graph, batch: &Batch) -> Result<(), GraphError> {
        graph.check_batch(batch.x.view(), batch.y.view())
    }
    fn samples(batch: &Batch) -> usize {
        batch.len()
    }
}

impl LoadedX for Features {
    fn read(path: &Path, graph: &Graph, order: AxisOrder) -> Result<Batch<Self>, DataError> {
        read_graph_data_kept(path, &graph.input(), &graph.output(), order)
    }
    fn drawn(batch: Batch) -> Batch<Self> {
        Batch {
            x: Features::F64(batch.x),
            y: batch.y,
        }
    }
    fn check(graph: &Graph, batch: &Batch<Self>) -> Result<(), GraphError> {
        match batch.x.inputs() {
            Inputs::Own(x) => graph.check_batch(x, batch.y.view()),
            Inputs::F32(x) => graph.check_batch(x, batch.y.view()),
        }
    }
    fn samples(batch: &Batch<Self>) -> usize {
        batch.len()
    }
}

impl<X: LoadedX> GraphLoaded<X> {
    fn load_with(
        desc: GraphDescription,
        inputs: &GraphInputs,
        vet: Vet,
    ) -> Result<GraphLoaded<X>, GraphLoadError> {
        let graph = &desc.graph;
        let (params, weights_source) = match inputs.weights {
            Some(path) => {
                // Only the tensors the description can name are read; strays are listed.
                let file = desc.read_weights(path)?;
                vet(&desc, &file, path).map_err(GraphLoadError::Misfit)?;
                check_finite(&file, path)?;
                let params = desc.read_params(&file, path)?;
                let source = WeightsSource::File {
                    path: path.to_path_buf(),
                    format: file.format.name().into(),
                    dtype: widest_float(&file).into(),
                };
                (params, source)
            }
            // On a graph of dense layers these are the values the dense engine drew from the
            // same seed (its augmented matrices row by row, the bias column taking no draw).
            None => (
                inputs.init.graph_params(graph, &mut Rng::new(inputs.seed)),
                WeightsSource::Init {
                    scheme: inputs.init.name().into(),
                    seed: inputs.seed,
                },
            ),
        };
        let (batch, data_source, order) = match inputs.data {
            Some(path) => {
                let batch = X::read(path, graph, inputs.order)?;
                let samples = X::samples(&batch);
                let source = DataSource::File {
                    path: path.to_path_buf(),
                    samples,
                };
                (batch, source, inputs.order)
            }
            None => {
                let m = inputs.samples;
                if m == 0 {
                    return Err(GraphLoadError::Usage(
                        "--batch is 0: a synthetic batch needs at least one sample".into(),
                    ));
                }
                let values = m.checked_mul(graph.input().size() + graph.output().size());
                if values.is_none_or(|v| v > MAX_SYNTHETIC_VALUES) {
                    return Err(GraphLoadError::Usage(format!(
                        "--batch {m} would draw more than {MAX_SYNTHETIC_VALUES} values for this network; use a smaller batch or give --data"
                    )));
                }
                let batch = X::drawn(Batch::graph_synthetic(graph, m, inputs.seed));
                let source = DataSource::Synthetic {
                    samples: m,
                    seed: inputs.seed,
                };
                (batch, source, AxisOrder::ChannelsFirst)
            }
        };
        let where_data = inputs.data.unwrap_or(&desc.path).to_path_buf();
        X::check(graph, &batch).map_err(|e| GraphLoadError::Input {
            path: where_data,
            message: format!("the data does not fit the network: {e}"),
        })?;
        let per_sample: usize = graph.input().size().saturating_add(
            graph
                .nodes()
                .iter()
                .map(|n| n.layer.output().size().saturating_add(n.layer.held()))
                .fold(0usize, usize::saturating_add),
        );
        let samples = X::samples(&batch);
        let values = per_sample
            .checked_mul(2)
            .and_then(|v| samples.checked_mul(v));
        if values.is_none_or(|v| v > MAX_ACTIVATION_VALUES) {
            return Err(GraphLoadError::Input {
                path: desc.path.clone(),
                message: format!(
                    "a batch of {} samples through this network needs {} activation values, more than the {} plumb holds; use fewer samples (--batch, or a smaller data file) or check the unit counts",
                    samples,
                    values.map_or("too many".to_string(), |v| v.to_string()),
                    MAX_ACTIVATION_VALUES
                ),
            });
        }
        if graph.loss_config().loss == Loss::CrossEntropy {
            check_probabilities(&batch.y, &data_source, graph, inputs.order)?;
        }
        Ok(GraphLoaded {
            description_hash: description_hash(&desc),
            desc,
            params,
            weights_source,
            batch,
            data_source,
            order,
        })
    }
}

/// Cross-entropy needs targets in [0, 1]: one-hot labels or probabilities. The first that is not
/// is named where it is in the data file ([`value_place`]).
fn check_probabilities(
    y: &Array2<f64>,
    source: &DataSource,
    graph: &Graph,
    order: AxisOrder,
) -> Result<(), GraphLoadError> {
    let bad = y.indexed_iter().find(|(_, v)| !(0.0..=1.0).contains(*v));
    if let Some(((i, k), v)) = bad {
        let place = value_place_in(source, graph, order, "y", i, k);
        return Err(GraphLoadError::Usage(format!(
            "{place}: {v} is outside [0, 1]; cross-entropy needs targets between 0 and 1 (one-hot labels or probabilities) — use squared-error for other targets"
        )));
    }
    Ok(())
}

/// Where sample `i` (from 0) of a batch is: "data.csv: sample 3 (line 4)", "d.npz: sample 3",
/// "synthetic sample 3".
pub fn sample_place(source: &DataSource, i: usize) -> String {
    match source {
        DataSource::File { path, .. } => {
            let line = match is_csv(path).then(|| csv_place(path, i, 0)).flatten() {
                Some((line, _)) => format!(" (line {line})"),
                None => String::new(),
            };
            format!("{}: sample {}{line}", path.display(), i + 1)
        }
        DataSource::Synthetic { .. } => format!("synthetic sample {}", i + 1),
    }
}

/// Where value `column` (from 0, in the engine's order of one sample's x or y) of sample `i`
/// (from 0) is in the data: a CSV file's line and column, with the header's name; an npz
/// array's element as the reader names one ([`archive_place`]).
pub fn value_place<X>(loaded: &GraphLoaded<X>, of: &str, i: usize, column: usize) -> String {
    let source = &loaded.data_source;
    value_place_in(source, &loaded.desc.graph, loaded.order, of, i, column)
}

/// [`value_place`] of a batch read from `source` for `graph` under `order`.
fn value_place_in(
    source: &DataSource,
    graph: &Graph,
    order: AxisOrder,
    of: &str,
    i: usize,
    column: usize,
) -> String {
    match source {
        DataSource::File { path, .. } if is_csv(path) => {
            // A row holds x's columns, then y's.
            let at = if of == "y" {
                graph.input().size() + column
            } else {
                column
            };
            match csv_place(path, i, at) {
                Some((line, name)) => format!(
                    "{}: line {line} (sample {}), column {} `{name}`",
                    path.display(),
                    i + 1,
                    at + 1
                ),
                None => format!("{}, column {}", sample_place(source, i), at + 1),
            }
        }
        DataSource::File { path, .. } => {
            let shape = if of == "y" {
                graph.output()
            } else {
                graph.input()
            };
            match archive_place(path, of, &shape, order, i, column) {
                Some((index, words)) => {
                    let index: Vec<String> = index.iter().map(usize::to_string).collect();
                    format!(
                        "{}: array `{of}`, element [{}] ({words})",
                        path.display(),
                        index.join(", ")
                    )
                }
                None => format!("{}, {of} value {}", sample_place(source, i), column + 1),
            }
        }
        DataSource::Synthetic { .. } => {
            format!("synthetic sample {}, {of} value {}", i + 1, column + 1)
        }
    }
}

fn is_csv(path: &Path) -> bool {
    path.extension()
        .is_some_and(|e| e.eq_ignore_ascii_case("csv"))
}

/// Non-finite weights make every figure meaningless: the first one is named by tensor and index
/// in the file's shape, with how many more there are.
fn check_finite(file: &TensorFile, path: &Path) -> Result<(), GraphLoadError> {
    for t in &file.tensors {
        let mut bad = t.data.iter().enumerate().filter(|(_, v)| !v.is_finite());
        if let Some((k, v)) = bad.next() {
            let more = bad.count();
            let mut index = vec![0; t.shape.len()];
            let mut rest = k;
            for (i, &d) in t.shape.iter().enumerate().rev() {
                index[i] = rest % d.max(1);
                rest /= d.max(1);
            }
            let idx: Vec<String> = index.iter().map(usize::to_string).collect();
            return Err(GraphLoadError::Input {
                path: path.to_path_buf(),
                message: format!(
                    "tensor `{}` holds {v} at [{}]{}; a loss or gradient of such weights means nothing — fix the export (byte order or dtype?) or the training run that produced it",
                    t.name,
                    idx.join(", "),
                    if more > 0 {
                        format!(" and {more} more non-finite values")
                    } else {
                        String::new()
                    }
                ),
            });
        }
    }
    Ok(())
}

/// The widest floating-point type among a file's tensors, read or listed (float64 if any, else
/// the narrower).
pub fn widest_float(file: &TensorFile) -> &'static str {
    use plumb_formats::DType;
    let rank = |d: DType| match d {
        DType::F64 => 3,
        DType::F32 => 2,
        DType::F16 | DType::BF16 => 1,
        _ => 0,
    };
    file.listing()
        .map(|(_, _, dtype)| dtype)
        .max_by_key(|&d| rank(d))
        .map_or("float64", |d| d.name())
}

/// A network's identity: an FNV-1a hash (64 bits), stable across versions and machines, that a
/// shard and a baseline carry so that a changed description is seen. A dense description's is
/// taken of its canonical text ([`GraphDescription::dense_text`], the hash baselines have always
/// recorded, which covers its conventions); any other's of the loss and its conventions, each
/// layer's kind, name, settings (stride, padding, heads, gate order…: what changes the function
/// with the same shapes), output shape and activation, and each file tensor's name, shape and
/// storage. Line numbers and comments enter neither.
pub fn description_hash(desc: &GraphDescription) -> String {
    let text = desc.dense_text("").unwrap_or_else(|| {
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
        text
    });
    let hash = text.bytes().fold(0xcbf2_9ce4_8422_2325u64, |h, b| {
        (h ^ b as u64).wrapping_mul(0x0100_0000_01b3)
    });
    format!("{hash:016x}")
}
