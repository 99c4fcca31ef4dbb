//! The files plumb reads and writes: network descriptions (TOML), weight and gradient files (NPY,
//! NPZ, safetensors), and data files (CSV, NPZ).
//!
//! Formats know nothing of gradients: they turn bytes into named tensors, networks and batches, and
//! back. Every error names the file and the place in it (key and line, tensor, byte offset), says
//! what is wrong and how to fix it.
//!
//! ```
//! use std::path::Path;
//! use plumb_formats::GraphDescription;
//!
//! let text = "inputs = 4\nloss = \"cross-entropy\"\nlayout = \"split\"\n[[layer]]\nunits = 3\nactivation = \"softmax\"\n";
//! let desc = GraphDescription::parse(Path::new("net.toml"), text)?;
//! let split: Vec<(String, Vec<usize>)> =
//!     desc.files.iter().map(|f| (f.name.clone(), f.shape.clone())).collect();
//! assert_eq!(split, [("layer1.weight".into(), vec![3, 4]), ("layer1.bias".into(), vec![3])]);
//! # Ok::<(), plumb_formats::DescriptionError>(())
//! ```

mod atomic;
mod data;
mod description;
mod file_tensors;
#[doc(hidden)]
pub mod fuzz;
mod graph_data;
mod graph_description;
mod input;
mod layer_settings;
mod npy;
mod npz;
mod safetensors_file;
mod settings;
mod tensor;
mod tensor_file;
mod walk;

pub use atomic::{Existing, leftovers, write_atomically, write_file};
pub use input::read_input;

/// The largest weight or gradient file plumb reads (16 GiB).
pub const MAX_TENSOR_BYTES: u64 = 16 << 30;
/// The largest data file plumb reads (4 GiB).
pub const MAX_DATA_BYTES: u64 = 4 << 30;
/// The largest network description plumb reads (1 MiB: a description is a few lines).
pub const MAX_DESCRIPTION_BYTES: u64 = 1 << 20;
/// The largest JSON report plumb reads back (a shard for `merge`, a `--baseline`): 256 MiB, about
/// a million coordinates of a check; a JSON value in memory costs a few times its text.
pub const MAX_REPORT_BYTES: u64 = 256 << 20;
/// The most values a batch's pass may hold at once (outputs, saved tensors, scratch: 1 GiB in
/// f64); a data file's one-hot targets alone are held to it before they are built.
pub const MAX_BATCH_VALUES: usize = 1 << 27;
pub use data::{DataError, csv_place, read_data};
pub use description::{DescriptionError, Layout, MAX_PARAMETERS};
pub use file_tensors::{FileStorage, FileTensor, INPUT_GRADIENT, LayoutError};
pub use graph_data::{AxisOrder, archive_place, read_graph_data, read_graph_data_kept};
pub use graph_description::GraphDescription;
pub use settings::{KINDS, KindSettings, LayerSettings};
pub use tensor::{DType, FileFormat, Tensor, TensorFile, TensorFileError, Unread, shape_text};
pub use tensor_file::{read_tensors, read_tensors_for, write_tensor_file, write_tensors};
