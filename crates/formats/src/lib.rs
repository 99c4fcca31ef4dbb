//! The files plumb reads and writes: network descriptions (TOML), weight and gradient files (NPY,
//! NPZ, safetensors), and data files (CSV, NPZ).
//!
//! Formats know nothing of gradients: they turn bytes into named tensors, networks and batches, and
//! back. Every error names the file and the place in it (key and line, tensor, byte offset), says
//! what is wrong and how to fix it.

mod atomic;
mod data;
mod description;
mod layout;
mod npy;
mod npz;
mod safetensors_file;
mod tensor;

pub use atomic::write_atomically;
pub use data::{DataError, read_data};
pub use description::{Description, DescriptionError, LayerDescription, Layout};
pub use layout::{
    ExpectedTensor, LayoutError, Role, assemble, disassemble, expected_tensors, shape_fits,
    shape_text,
};
pub use tensor::{
    DType, FileFormat, Tensor, TensorFile, TensorFileError, read_tensors, write_tensors,
};
