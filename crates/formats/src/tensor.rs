//! The shared model of a weight or gradient file — named tensors widened to f64, the formats and
//! their errors. It uses no codec: the codecs (npy.rs, npz.rs, safetensors_file.rs) build on it,
//! and tensor_file.rs dispatches a path to them.

use std::fmt;
use std::path::{Path, PathBuf};

use ndarray::Array2;

/// The element type a tensor is stored in. Values are always handed out as f64; the stored type
/// still matters: it sets the precision a gradient check can expect, and a shape audit reports it.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum DType {
    F16,
    BF16,
    F32,
    F64,
    I8,
    I16,
    I32,
    I64,
    U8,
    U16,
    U32,
    U64,
    Bool,
}

impl DType {
    /// Whether the type holds floating-point values (weights and gradients normally do).
    pub fn is_float(&self) -> bool {
        matches!(self, DType::F16 | DType::BF16 | DType::F32 | DType::F64)
    }

    /// NumPy's name for the type (`float32`, `bfloat16`, `int64`, `bool`, …).
    pub fn name(&self) -> &'static str {
        match self {
            DType::F16 => "float16",
            DType::BF16 => "bfloat16",
            DType::F32 => "float32",
            DType::F64 => "float64",
            DType::I8 => "int8",
            DType::I16 => "int16",
            DType::I32 => "int32",
            DType::I64 => "int64",
            DType::U8 => "uint8",
            DType::U16 => "uint16",
            DType::U32 => "uint32",
            DType::U64 => "uint64",
            DType::Bool => "bool",
        }
    }

    /// Bytes per element in the file.
    pub fn size(&self) -> usize {
        match self {
            DType::I8 | DType::U8 | DType::Bool => 1,
            DType::F16 | DType::BF16 | DType::I16 | DType::U16 => 2,
            DType::F32 | DType::I32 | DType::U32 => 4,
            DType::F64 | DType::I64 | DType::U64 => 8,
        }
    }
}

impl fmt::Display for DType {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// One named tensor. `data` is in C (row-major) order whatever the file's order, and widened to
/// f64 whatever the file's type, so that integer or bool tensors can still be reported by a shape
/// audit instead of being refused at the door. `Tensor<f32>` is an f32 member a data file's
/// reader kept as stored (`plumb grad`'s batch, [`crate::read_graph_data_kept`]).
#[derive(Clone, Debug, PartialEq)]
pub struct Tensor<T = f64> {
    pub name: String,
    pub shape: Vec<usize>,
    pub dtype: DType,
    pub data: Vec<T>,
}

impl Tensor {
    /// Number of elements.
    pub fn len(&self) -> usize {
        self.data.len()
    }

    pub fn is_empty(&self) -> bool {
        self.data.is_empty()
    }

    /// The tensor as a matrix, if it is 2-D (and its data matches its shape).
    pub fn to_array2(&self) -> Option<Array2<f64>> {
        match self.shape[..] {
            [rows, cols] => Array2::from_shape_vec((rows, cols), self.data.clone()).ok(),
            _ => None,
        }
    }

    /// A float64 tensor of that shape, its data in C order.
    pub fn new(name: impl Into<String>, shape: Vec<usize>, data: Vec<f64>) -> Tensor {
        Tensor {
            name: name.into(),
            shape,
            dtype: DType::F64,
            data,
        }
    }

    /// The Euclidean norm of the data.
    pub fn norm(&self) -> f64 {
        self.data.iter().map(|v| v * v).sum::<f64>().sqrt()
    }

    /// A 2-D tensor transposed (shape reversed); others unchanged.
    pub fn transposed(&self) -> Tensor {
        match self.shape.as_slice() {
            &[r, c] => {
                let mut data = vec![0.0; self.data.len()];
                for i in 0..r {
                    for j in 0..c {
                        data[j * r + i] = self.data[i * c + j];
                    }
                }
                Tensor {
                    name: self.name.clone(),
                    shape: vec![c, r],
                    dtype: self.dtype,
                    data,
                }
            }
            _ => self.clone(),
        }
    }

    /// The multi-index of a flat C-order position.
    pub fn index_of(&self, mut k: usize) -> Vec<usize> {
        let mut idx = vec![0; self.shape.len()];
        for (i, &d) in self.shape.iter().enumerate().rev() {
            idx[i] = k % d.max(1);
            k /= d.max(1);
        }
        idx
    }

    /// A float64 tensor holding a matrix.
    pub fn from_array2(name: impl Into<String>, matrix: &Array2<f64>) -> Tensor {
        Tensor {
            name: name.into(),
            shape: vec![matrix.nrows(), matrix.ncols()],
            dtype: DType::F64,
            // `iter` walks in logical row-major order even for a transposed or sliced view.
            data: matrix.iter().copied().collect(),
        }
    }

    /// A float64 vector (a bias, say).
    pub fn from_vec1(name: impl Into<String>, values: Vec<f64>) -> Tensor {
        Tensor {
            name: name.into(),
            shape: vec![values.len()],
            dtype: DType::F64,
            data: values,
        }
    }
}

/// The tensor-file formats plumb reads and writes.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum FileFormat {
    Npy,
    Npz,
    Safetensors,
}

impl FileFormat {
    /// The format a path's extension names (case-insensitive), if any.
    pub fn from_path(path: &Path) -> Option<FileFormat> {
        let extension = path.extension()?.to_str()?.to_ascii_lowercase();
        match extension.as_str() {
            "npy" => Some(FileFormat::Npy),
            "npz" => Some(FileFormat::Npz),
            "safetensors" => Some(FileFormat::Safetensors),
            _ => None,
        }
    }

    /// A short name for messages and reports.
    pub fn name(&self) -> &'static str {
        match self {
            FileFormat::Npy => "NPY",
            FileFormat::Npz => "NPZ",
            FileFormat::Safetensors => "safetensors",
        }
    }
}

impl fmt::Display for FileFormat {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// The tensors of one file, in the file's own order: NPZ archive order, safetensors data-offset
/// order (the order a model's layers were usually saved in).
#[derive(Clone, Debug, PartialEq)]
pub struct TensorFile {
    pub format: FileFormat,
    /// The tensors read, values and all.
    pub tensors: Vec<Tensor>,
    /// The tensors listed from their headers alone (empty unless the reader was told which
    /// names it may use: [`crate::read_tensors_for`]).
    pub unread: Vec<Unread>,
}

impl TensorFile {
    /// A file whose every tensor was read.
    pub fn new(format: FileFormat, tensors: Vec<Tensor>) -> TensorFile {
        TensorFile {
            format,
            tensors,
            unread: Vec::new(),
        }
    }

    /// The tensor of that name, if the file has one and it was read.
    pub fn get(&self, name: &str) -> Option<&Tensor> {
        self.tensors.iter().find(|t| t.name == name)
    }

    /// Every tensor of the file, read or not, in the file's order: its name, shape and stored
    /// type. What a report lists of a file; a file's values are in [`TensorFile::tensors`].
    pub fn listing(&self) -> impl Iterator<Item = (&str, &[usize], DType)> {
        let mut unread = self.unread.iter().peekable();
        let mut read = self.tensors.iter().enumerate().peekable();
        std::iter::from_fn(move || {
            let next_read = read.peek().map(|(i, _)| *i).unwrap_or(usize::MAX);
            if let Some(u) = unread.next_if(|u| u.after <= next_read) {
                return Some((u.name.as_str(), u.shape.as_slice(), u.dtype));
            }
            read.next()
                .map(|(_, t)| (t.name.as_str(), t.shape.as_slice(), t.dtype))
        })
    }

    /// How many tensors the file holds, read or not.
    pub fn count(&self) -> usize {
        self.tensors.len() + self.unread.len()
    }
}

/// A tensor of a file known from its header alone — name, shape and stored type — whose values
/// were neither inflated nor widened: no name the reader could use matches it (a note in a data
/// archive, a stray array beside the weights), and an archive member can inflate to gigabytes
/// from a few kilobytes. Reports still list it.
#[derive(Clone, Debug, PartialEq)]
pub struct Unread {
    pub name: String,
    pub shape: Vec<usize>,
    pub dtype: DType,
    /// How many of the file's read tensors come before it: its place in the file's order.
    pub after: usize,
}

/// Why a tensor file could not be read or written. Every variant carries the path and, where one
/// applies, the NPZ member or tensor and the byte offset (within the member for NPZ), so the CLI can
/// print it as it stands.
#[derive(Debug, thiserror::Error)]
pub enum TensorFileError {
    #[error("{}: cannot {action} the file: {source}", .path.display())]
    Io {
        path: PathBuf,
        action: &'static str,
        source: std::io::Error,
    },

    #[error(
        "{}: unknown tensor file extension{}; plumb reads and writes .npy, .npz and .safetensors{}",
        .path.display(), ext_note(.path), content_note(*.content)
    )]
    UnknownExtension {
        path: PathBuf,
        /// What the content looks like, when its magic bytes say so.
        content: Option<FileFormat>,
    },

    #[error(
        "{}: the name says {expected} but the content is {}; rename the file to .{}",
        .path.display(), content_description(*.found), extension(*.found)
    )]
    WrongContent {
        path: PathBuf,
        expected: FileFormat,
        found: FileFormat,
    },

    #[error(
        "{}: not {} file: it starts with {found} instead of {expected}; the file is damaged or of \
         another kind — write it again with {}",
        place(.path, .member, Some(0)), article(*.format), writer(*.format)
    )]
    BadMagic {
        path: PathBuf,
        member: Option<String>,
        format: FileFormat,
        expected: &'static str,
        /// The first bytes found, already rendered for the message.
        found: String,
    },

    #[error(
        "{}: {problem}; the NPY header is damaged — write the file again with np.save",
        place(.path, .member, Some(*.offset))
    )]
    BadHeader {
        path: PathBuf,
        member: Option<String>,
        offset: u64,
        problem: String,
    },

    #[error(
        "{}: tensor `{tensor}` is stored as {dtype}, which plumb does not read; store it as \
         float16/32/64, an integer type or bool (e.g. arr.astype(np.float64))",
        place(.path, .member, Some(*.offset))
    )]
    UnsupportedDType {
        path: PathBuf,
        member: Option<String>,
        tensor: String,
        offset: u64,
        /// The type as the file spells it (`'<c16'`, `'|O'`, `C64`, …) with a gloss.
        dtype: String,
    },

    #[error(
        "{}: the header declares shape {} of {dtype}, more bytes than any file can hold; the header \
         is damaged — write the file again",
        place(.path, .member, Some(*.offset)), shape_text(.shape)
    )]
    SizeOverflow {
        path: PathBuf,
        member: Option<String>,
        tensor: String,
        offset: u64,
        shape: Box<[usize]>,
        dtype: DType,
    },

    #[error(
        "{}: the header declares shape {} of {dtype} ({} bytes) but only {available} bytes \
         follow; the file is truncated — write it again",
        place(.path, .member, Some(*.offset)), shape_text(.shape), byte_count(.shape, *.dtype)
    )]
    Truncated {
        path: PathBuf,
        member: Option<String>,
        tensor: String,
        /// Where the data starts.
        offset: u64,
        shape: Box<[usize]>,
        dtype: DType,
        /// Bytes present after the header (the bytes needed follow from shape and dtype).
        available: u64,
    },

    #[error(
        "{}: the header declares shape {} of {dtype} ({} bytes) but {available} bytes \
         follow; the shape in the header does not match the data — write the file again",
        place(.path, .member, Some(*.offset)), shape_text(.shape), byte_count(.shape, *.dtype)
    )]
    TrailingBytes {
        path: PathBuf,
        member: Option<String>,
        tensor: String,
        offset: u64,
        shape: Box<[usize]>,
        dtype: DType,
        /// Bytes present after the header (the bytes needed follow from shape and dtype).
        available: u64,
    },

    #[error(
        "{}: not a readable zip archive: {source}; an NPZ file is a zip of .npy members — write \
         it again with np.savez or np.savez_compressed",
        place(.path, .member, None)
    )]
    Zip {
        path: PathBuf,
        member: Option<String>,
        source: zip::result::ZipError,
    },

    #[error("{}: member `{member}`: {problem}", .path.display())]
    BadMember {
        path: PathBuf,
        member: String,
        /// What is wrong and how to fix it.
        problem: String,
    },

    #[error(
        "{}: two or more members have the same name, so which array is meant is ambiguous; write \
         the archive again with np.savez",
        .path.display()
    )]
    DuplicateMembers { path: PathBuf },

    #[error(
        "{}: not a valid safetensors file: {source} ({hint}); write it again with safetensors' \
         save_file",
        .path.display()
    )]
    Safetensors {
        path: PathBuf,
        /// What the library's complaint most likely means.
        hint: &'static str,
        source: safetensors::SafeTensorError,
    },

    #[error(
        "{}: cannot write {dtype}: plumb writes float32 or float64 tensor files",
        .path.display()
    )]
    WriteDType { path: PathBuf, dtype: DType },

    #[error(
        "{}: the safetensors header names the tensor `{tensor}` twice; each tensor needs a name \
         of its own: write the file again with safetensors' save_file",
        .path.display()
    )]
    RepeatedName { path: PathBuf, tensor: String },

    #[error("{}: cannot write tensor `{tensor}`: {problem}", .path.display())]
    BadTensor {
        path: PathBuf,
        tensor: String,
        problem: String,
    },
}

impl TensorFileError {
    /// The file the error is about.
    pub fn path(&self) -> &Path {
        match self {
            TensorFileError::Io { path, .. }
            | TensorFileError::UnknownExtension { path, .. }
            | TensorFileError::WrongContent { path, .. }
            | TensorFileError::BadMagic { path, .. }
            | TensorFileError::BadHeader { path, .. }
            | TensorFileError::UnsupportedDType { path, .. }
            | TensorFileError::SizeOverflow { path, .. }
            | TensorFileError::Truncated { path, .. }
            | TensorFileError::TrailingBytes { path, .. }
            | TensorFileError::Zip { path, .. }
            | TensorFileError::BadMember { path, .. }
            | TensorFileError::DuplicateMembers { path }
            | TensorFileError::Safetensors { path, .. }
            | TensorFileError::WriteDType { path, .. }
            | TensorFileError::RepeatedName { path, .. }
            | TensorFileError::BadTensor { path, .. } => path,
        }
    }
}

/// "weights.npz: member `layer1.npy`, byte 10" — the prefix every located message starts with.
fn place(path: &Path, member: &Option<String>, offset: Option<u64>) -> String {
    let mut text = path.display().to_string();
    if let Some(member) = member {
        text.push_str(&format!(": member `{member}`"));
    }
    if let Some(offset) = offset {
        text.push_str(if member.is_some() { ", " } else { ": " });
        text.push_str(&format!("byte {offset}"));
    }
    text
}

/// The bytes a shape of a dtype needs (only called for shapes already checked not to overflow).
fn byte_count(shape: &[usize], dtype: DType) -> u128 {
    shape.iter().fold(dtype.size() as u128, |acc, &d| {
        acc.saturating_mul(d as u128)
    })
}

/// A shape as Python prints a tuple: `(3, 4)`, `(3,)`, `()`.
pub fn shape_text(shape: &[usize]) -> String {
    match shape {
        [] => "()".to_string(),
        [n] => format!("({n},)"),
        _ => {
            let dims: Vec<String> = shape.iter().map(usize::to_string).collect();
            format!("({})", dims.join(", "))
        }
    }
}

fn ext_note(path: &Path) -> String {
    match path.extension() {
        Some(ext) => format!(" `.{}`", ext.to_string_lossy()),
        None => " (none)".to_string(),
    }
}

fn content_note(content: Option<FileFormat>) -> String {
    match content {
        Some(format) => format!(
            "; the content looks like {} — rename the file to .{}",
            content_description(format),
            extension(format)
        ),
        None => String::new(),
    }
}

fn content_description(format: FileFormat) -> &'static str {
    match format {
        FileFormat::Npy => "a single NPY array",
        FileFormat::Npz => "a zip archive (an NPZ file)",
        FileFormat::Safetensors => "a safetensors file",
    }
}

fn extension(format: FileFormat) -> &'static str {
    match format {
        FileFormat::Npy => "npy",
        FileFormat::Npz => "npz",
        FileFormat::Safetensors => "safetensors",
    }
}

fn article(format: FileFormat) -> &'static str {
    match format {
        FileFormat::Npy => "an NPY",
        FileFormat::Npz => "an NPZ",
        FileFormat::Safetensors => "a safetensors",
    }
}

fn writer(format: FileFormat) -> &'static str {
    match format {
        FileFormat::Npy => "np.save",
        FileFormat::Npz => "np.savez",
        FileFormat::Safetensors => "safetensors' save_file",
    }
}
