//! Loading what a command runs on: the description, the weights (a file, or drawn from a seed) and
//! the data (a file, or a seeded synthetic batch), with errors that say which file and how to fix it.

use std::path::Path;

use anyhow::{Context, Result, bail};
use plumb_audit::refuse_misfit;
use plumb_engine::{Features, Init};
use plumb_fd::report::{GraphInputs, GraphLoaded};
use plumb_formats::{AxisOrder, DType, FileFormat, GraphDescription};
use plumb_report::NetworkId;
pub use plumb_report::{DataSource, WeightsSource};

use crate::args::{InitArg, Inputs};
use crate::output::network_id;

/// Samples in a synthetic batch when --batch is not given.
pub const DEFAULT_BATCH: usize = 32;

/// The element type a gradient of these weights should be written in by default.
pub fn gradient_dtype(source: &WeightsSource) -> DType {
    match source {
        WeightsSource::File { dtype, .. } if *dtype != "float64" => DType::F32,
        _ => DType::F64,
    }
}

pub fn init_scheme(arg: InitArg) -> Init {
    match arg {
        InitArg::GlorotUniform => Init::GlorotUniform,
        InitArg::GlorotNormal => Init::GlorotNormal,
        InitArg::HeUniform => Init::HeUniform,
        InitArg::HeNormal => Init::HeNormal,
        InitArg::LecunNormal => Init::LecunNormal,
    }
}

/// Loads a description of any kind onto the layer graph, with its weights (a file, vetted by
/// the dimension audit, or drawn from the seed), its batch (a file or drawn from the seed) and
/// the network's identity for baselines.
pub fn load_graph(inputs: &Inputs, seed: u64) -> Result<(GraphLoaded, NetworkId)> {
    load_graph_with(inputs, seed, |desc, inputs| {
        Ok(GraphLoaded::load_vetted(desc, inputs, &refuse_misfit)?)
    })
}

/// [`load_graph`], with a data file's flat f32 x kept in f32 (`plumb grad`'s whole-batch
/// gradient reads it so).
pub fn load_graph_kept(inputs: &Inputs, seed: u64) -> Result<(GraphLoaded<Features>, NetworkId)> {
    load_graph_with(inputs, seed, |desc, inputs| {
        Ok(GraphLoaded::load_kept(desc, inputs, &refuse_misfit)?)
    })
}

fn load_graph_with<X>(
    inputs: &Inputs,
    seed: u64,
    load: impl FnOnce(GraphDescription, &GraphInputs) -> Result<GraphLoaded<X>>,
) -> Result<(GraphLoaded<X>, NetworkId)> {
    let desc = GraphDescription::read(&inputs.net)?;
    if inputs.channels_last && desc.is_dense() {
        bail!(
            "--channels-last: the input of {} is {} features, with no channel axis; leave the flag out",
            desc.path.display(),
            desc.graph.input().size()
        );
    }
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
    let loaded = load(desc, &graph_inputs)?;
    let id = network_id(&loaded.desc);
    Ok((loaded, id))
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
    // The directory it goes in, found out now rather than after the whole run.
    let parent = path.parent().filter(|p| !p.as_os_str().is_empty());
    if let Some(dir) = parent.filter(|d| !d.is_dir()) {
        bail!(
            "{}: the directory {} does not exist; create it, or write the output elsewhere",
            path.display(),
            dir.display()
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
