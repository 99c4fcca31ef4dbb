//! Loading what a command runs on: the description, the weights (a file, or drawn from a seed) and
//! the data (a file, or a seeded synthetic batch), with errors that say which file and how to fix it.

use std::path::Path;

use anyhow::{Context, Result, bail};
use plumb_audit::audit_shapes;
use plumb_engine::{Batch, Init, Loss, Rng, Weights};
use plumb_fd::report::{GraphInputs, GraphLoaded};
use plumb_formats::{
    AnyDescription, AxisOrder, DType, Description, FileFormat, GraphDescription, TensorFile,
    assemble, read_data, read_tensors,
};
pub use plumb_report::{DataSource, WeightsSource};
use plumb_report::{NetworkId, Severity, Verdict};

use crate::args::{InitArg, Inputs};
use crate::output::{graph_network_id, network_id};

/// Samples in a synthetic batch when --batch is not given.
pub const DEFAULT_BATCH: usize = 32;

/// The largest synthetic batch, in values (2²⁶ = 512 MiB of f64), a guard against a typo.
const MAX_SYNTHETIC_VALUES: usize = 1 << 26;
/// The most pre-activation and activation values a forward pass may hold (2²⁷ = 1 GiB of f64).
const MAX_ACTIVATION_VALUES: usize = 1 << 27;

/// The element type a gradient of these weights should be written in by default.
pub fn gradient_dtype(source: &WeightsSource) -> DType {
    match source {
        WeightsSource::File { dtype, .. } if *dtype != "float64" => DType::F32,
        _ => DType::F64,
    }
}

/// Everything a command that runs the engine needs.
pub use plumb_fd::report::Loaded;

pub fn init_scheme(arg: InitArg) -> Init {
    match arg {
        InitArg::GlorotUniform => Init::GlorotUniform,
        InitArg::GlorotNormal => Init::GlorotNormal,
        InitArg::HeUniform => Init::HeUniform,
        InitArg::HeNormal => Init::HeNormal,
        InitArg::LecunNormal => Init::LecunNormal,
    }
}

/// What `load_any` read: a dense description runs today's dense engine (its graph kept for what
/// only the graph gives); any other kind runs the layer graph.
pub enum AnyLoaded {
    Dense(Box<Loaded>, Box<GraphDescription>),
    Graph(Box<GraphLoaded>),
}

/// Loads a description of any kind onto the layer graph, with the network's identity for
/// baselines. A dense description is read and checked by the dense loader (its messages: the
/// weights' dimension audit, the data file's lines), then run as the same weights, batch and
/// sources on the graph ([`GraphLoaded::from_dense`]); its identity stays the one baselines recorded.
pub fn load_graph(inputs: &Inputs, seed: u64) -> Result<(GraphLoaded, NetworkId)> {
    Ok(match load_any(inputs, seed)? {
        AnyLoaded::Dense(loaded, desc) => {
            let id = network_id(&loaded.desc);
            (GraphLoaded::from_dense(*loaded, *desc), id)
        }
        AnyLoaded::Graph(loaded) => {
            let id = graph_network_id(&loaded.desc);
            (*loaded, id)
        }
    })
}

/// Loads a description of any kind, reading it once (the commands that run the graph).
pub fn load_any(inputs: &Inputs, seed: u64) -> Result<AnyLoaded> {
    match AnyDescription::read(&inputs.net)? {
        AnyDescription::Dense(desc, graph) => Ok(AnyLoaded::Dense(
            Box::new(load_dense(inputs, seed, desc)?),
            graph,
        )),
        AnyDescription::Graph(desc) => {
            let order = if inputs.channels_last {
                AxisOrder::ChannelsLast
            } else {
                AxisOrder::ChannelsFirst
            };
            let graph_inputs = GraphInputs {
                weights: inputs.weights.as_deref(),
                data: inputs.data.as_deref(),
                order,
                init: init_scheme(inputs.init),
                seed,
                samples: inputs.batch.unwrap_or(DEFAULT_BATCH),
            };
            Ok(AnyLoaded::Graph(Box::new(GraphLoaded::load(
                desc,
                &graph_inputs,
            )?)))
        }
    }
}

fn load_dense(inputs: &Inputs, seed: u64, desc: Description) -> Result<Loaded> {
    if inputs.channels_last {
        bail!(
            "--channels-last: the input of {} is {} features, with no channel axis; leave the flag out",
            desc.path.display(),
            desc.inputs()
        );
    }
    let (weights, weights_source) = match &inputs.weights {
        Some(path) => {
            let file = read_tensors(path)?;
            let weights = weights_from_file(&desc, &file, path)?;
            let dtype = widest_float(&file);
            (
                weights,
                WeightsSource::File {
                    path: path.clone(),
                    format: file.format.name().into(),
                    dtype: dtype.into(),
                },
            )
        }
        None => {
            let scheme = init_scheme(inputs.init);
            let w = scheme.weights(&desc.network, &mut Rng::new(seed));
            (
                w,
                WeightsSource::Init {
                    scheme: scheme.name().into(),
                    seed,
                },
            )
        }
    };
    let (batch, data_source) = load_batch(inputs, &desc, seed, DEFAULT_BATCH)?;
    Ok(Loaded {
        desc,
        weights,
        weights_source,
        batch,
        data_source,
    })
}

/// Cross-entropy needs targets in [0, 1]: one-hot labels or probabilities.
fn check_probabilities(batch: &Batch, source: &DataSource) -> Result<()> {
    let bad = batch
        .y
        .indexed_iter()
        .find(|(_, v)| !(0.0..=1.0).contains(*v));
    if let Some(((i, k), v)) = bad {
        let place = match source {
            DataSource::File { path, .. } => {
                let line = if path
                    .extension()
                    .is_some_and(|e| e.eq_ignore_ascii_case("csv"))
                {
                    format!(" (line {})", i + 2)
                } else {
                    String::new()
                };
                format!(
                    "{}: sample {}{line}, target {}",
                    path.display(),
                    i + 1,
                    k + 1
                )
            }
            DataSource::Synthetic { .. } => format!("synthetic sample {}, target {}", i + 1, k + 1),
        };
        bail!(
            "{place}: {v} is outside [0, 1]; cross-entropy needs targets between 0 and 1 (one-hot labels or probabilities) — use squared-error for other targets"
        );
    }
    Ok(())
}

/// Non-finite weights make every figure meaningless: name the first, and how many there are.
fn check_finite(file: &TensorFile, path: &Path) -> Result<()> {
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
            bail!(
                "{}: tensor `{}` holds {v} at [{}]{}; a loss or gradient of such weights means nothing — fix the export (byte order or dtype?) or the training run that produced it",
                path.display(),
                t.name,
                idx.join(", "),
                if more > 0 {
                    format!(" and {more} more non-finite values")
                } else {
                    String::new()
                }
            );
        }
    }
    Ok(())
}

/// The probe or training batch: the data file, or a seeded synthetic batch of `--batch` samples
/// (`default_batch` when not given), checked against the network and the memory budget.
pub fn load_batch(
    inputs: &Inputs,
    desc: &Description,
    seed: u64,
    default_batch: usize,
) -> Result<(Batch, DataSource)> {
    let net = &desc.network;
    let (batch, data_source) = match &inputs.data {
        Some(path) => {
            let batch = read_data(path, net.inputs(), net.outputs())?;
            let samples = batch.len();
            (
                batch,
                DataSource::File {
                    path: path.clone(),
                    samples,
                },
            )
        }
        None => {
            let m = inputs.batch.unwrap_or(default_batch);
            if m == 0 {
                bail!("--batch is 0: a synthetic batch needs at least one sample");
            }
            let values = m.checked_mul(net.inputs() + net.outputs());
            if values.is_none_or(|v| v > MAX_SYNTHETIC_VALUES) {
                bail!(
                    "--batch {m} would draw more than {MAX_SYNTHETIC_VALUES} values for this network; use a smaller batch or give --data"
                );
            }
            (
                Batch::synthetic(net, m, seed),
                DataSource::Synthetic { samples: m, seed },
            )
        }
    };
    let units: usize = net.inputs() + net.layers().iter().map(|l| l.units).sum::<usize>();
    let values = batch.len().checked_mul(2 * units);
    if values.is_none_or(|v| v > MAX_ACTIVATION_VALUES) {
        bail!(
            "{}: a batch of {} samples through this network needs {} activation values, more than the {} plumb holds; use fewer samples (--batch, or a smaller data file) or check the unit counts",
            desc.path.display(),
            batch.len(),
            values.map_or("too many".to_string(), |v| v.to_string()),
            MAX_ACTIVATION_VALUES
        );
    }
    if net.loss() == Loss::CrossEntropy {
        check_probabilities(&batch, &data_source)?;
    }
    Ok((batch, data_source))
}

/// The weights of a file, after the dimension audit has found nothing wrong with it.
fn weights_from_file(desc: &Description, file: &TensorFile, path: &Path) -> Result<Weights<f64>> {
    let audit = audit_shapes(desc, Some(file));
    if audit.verdict == Verdict::Fail {
        let problems: Vec<String> = audit
            .findings
            .iter()
            .filter(|f| f.severity == Severity::Error)
            .take(4)
            .map(|f| match &f.tensor {
                Some(t) => format!("  - {t}: {} ({})", f.message, f.code),
                None => format!("  - {} ({})", f.message, f.code),
            })
            .collect();
        bail!(
            "{}: the weights do not fit {}:\n{}\nrun `plumb shapes {} --weights {}` for the full dimension audit",
            path.display(),
            desc.path.display(),
            problems.join("\n"),
            desc.path.display(),
            path.display()
        );
    }
    check_finite(file, path)?;
    Ok(assemble(desc, file, path)?)
}

/// The widest floating-point type among a file's tensors (float64 if any, else the narrower).
pub fn widest_float(file: &TensorFile) -> &'static str {
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

/// The format an output path asks for by its extension.
pub fn output_format(path: &Path) -> Result<FileFormat> {
    FileFormat::from_path(path).with_context(|| {
        format!(
            "{}: unknown extension; write the gradient to a .npz, .safetensors or .npy file",
            path.display()
        )
    })
}

/// Refuses to replace an existing file unless asked, and never replaces an input.
pub fn check_output(path: &Path, force: bool, inputs: &[&Path]) -> Result<()> {
    let same = |a: &Path, b: &Path| match (a.canonicalize(), b.canonicalize()) {
        (Ok(x), Ok(y)) => x == y,
        _ => false,
    };
    if let Some(i) = inputs.iter().find(|i| same(path, i)) {
        bail!(
            "{}: this is an input of the run ({}); write the output elsewhere",
            path.display(),
            i.display()
        );
    }
    // What is at the path itself: a dangling symbolic link exists as much as a file does.
    if let Ok(meta) = std::fs::symlink_metadata(path) {
        let kind = meta.file_type();
        if kind.is_dir() || path.is_dir() {
            bail!("{}: is a directory; give a file name", path.display());
        }
        if !kind.is_file() && !kind.is_symlink() {
            bail!(
                "{}: not a regular file (a device, a FIFO or a socket); plumb replaces only \
                 regular files, even with --force: give another name",
                path.display()
            );
        }
        if !force {
            bail!(
                "{}: the file exists{}; pass --force to replace it, or choose another name",
                path.display(),
                if path.exists() {
                    ""
                } else {
                    " (a symbolic link to nothing)"
                }
            );
        }
    }
    for left in plumb_formats::leftovers(path) {
        eprintln!(
            "plumb: warning: {} is left from a plumb run that was killed while writing {}; \
             remove it",
            left.display(),
            path.display()
        );
    }
    Ok(())
}

/// Refuses one path given for two outputs (`-o X --junit X`): the second would replace the
/// first. Paths are compared as the files they would name (directory resolved, name kept).
pub fn distinct_outputs(outputs: &[&Path]) -> Result<()> {
    let key = |p: &Path| {
        let dir = match p.parent() {
            Some(d) if !d.as_os_str().is_empty() => d,
            _ => Path::new("."),
        };
        (
            dir.canonicalize().unwrap_or_else(|_| dir.to_path_buf()),
            p.file_name().map(|n| n.to_os_string()),
        )
    };
    for (i, a) in outputs.iter().enumerate() {
        if let Some(b) = outputs[..i].iter().find(|b| key(b) == key(a)) {
            bail!(
                "{}: given for two outputs ({} and {}); give each output its own file",
                a.display(),
                b.display(),
                a.display()
            );
        }
    }
    Ok(())
}
