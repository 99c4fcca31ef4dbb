//! Tensor files by their format: reading and writing `.npy`, `.npz` and `.safetensors` through
//! the codec each extension names (the model of a tensor file is tensor.rs; the codecs build on
//! it, and this dispatch on both).

use std::path::Path;

use crate::npz::Wanted;
use crate::tensor::{DType, FileFormat, Tensor, TensorFile, TensorFileError, shape_text};
use crate::{npy, npz, safetensors_file};

/// Read every tensor of a `.npy`, `.npz` or `.safetensors` file (chosen by extension). A single
/// `.npy` holds one tensor, named after the file stem.
pub fn read_tensors(path: &Path) -> Result<TensorFile, TensorFileError> {
    read_tensors_for(path, &|_| true)
}

/// [`read_tensors`] for a reader that uses only the tensors whose names are `wanted`: the others
/// are listed in [`TensorFile::unread`] from their headers (an NPZ member's NPY header, a
/// safetensors header entry), their values neither inflated nor widened, so that an archive
/// member nothing uses costs its header, whatever it inflates to. Every header is still checked:
/// a damaged one is refused naming the file and member, as a read would. A `.npy` holds one
/// tensor and is read whole.
pub fn read_tensors_for(
    path: &Path,
    wanted: &dyn Fn(&str) -> bool,
) -> Result<TensorFile, TensorFileError> {
    read_tensors_kept(path, None, wanted).map(|(file, _, _)| file)
}

/// Where a tensor's first value that is not finite lies, when a read looked on the way:
/// `Some(None)` all are finite, `Some(Some(i))` flat index i is not, `None` nobody looked.
pub(crate) type Seen = Option<Option<usize>>;

/// An f32 member kept as stored: its place among the file's members (the number before it,
/// read or not), its tensor and what the read saw of its finiteness.
pub(crate) type Kept = Option<(usize, (Tensor<f32>, Seen))>;

/// [`read_tensors_for`], with what the read saw of each tensor's finiteness (a streamed
/// archive's values are tested piece by piece while in cache; a batch of 8,192 images is 51 MB
/// to read again otherwise), and the member named `narrow`, when an archive of stored members
/// holds it in f32, kept in f32 and left out of the file's tensors.
pub(crate) fn read_tensors_kept(
    path: &Path,
    narrow: Option<&str>,
    wanted: Wanted<'_>,
) -> Result<(TensorFile, Vec<Seen>, Kept), TensorFileError> {
    let format = FileFormat::from_path(path);
    if format == Some(FileFormat::Npz)
        && let Some(read) = streamed_npz(path, narrow, wanted)
    {
        let (tensors, seen) = read.tensors.into_iter().unzip();
        let file = TensorFile {
            format: FileFormat::Npz,
            tensors,
            unread: read.unread,
        };
        return Ok((file, seen, read.narrow));
    }
    // Reading the whole file bounds every later allocation by what is really there.
    let bytes = crate::input::read_input(path, crate::MAX_TENSOR_BYTES).map_err(|source| {
        TensorFileError::Io {
            path: path.to_path_buf(),
            action: "read",
            source,
        }
    })?;
    let content = sniff(&bytes);
    let Some(format) = format else {
        return Err(TensorFileError::UnknownExtension {
            path: path.to_path_buf(),
            content,
        });
    };
    if let Some(found) = content
        && found != format
    {
        return Err(TensorFileError::WrongContent {
            path: path.to_path_buf(),
            expected: format,
            found,
        });
    }
    let (tensors, unread) = match format {
        FileFormat::Npy => {
            let name = path
                .file_stem()
                .map(|s| s.to_string_lossy().into_owned())
                .unwrap_or_default();
            (vec![npy::read(path, None, &name, &bytes)?], Vec::new())
        }
        FileFormat::Npz => npz::read(path, &bytes, wanted)?,
        FileFormat::Safetensors => safetensors_file::read(path, &bytes, wanted)?,
    };
    let seen = vec![None; tensors.len()];
    let file = TensorFile {
        format,
        tensors,
        unread,
    };
    Ok((file, seen, None))
}

/// The tensors of an archive of stored members, each widened as it is read from the file
/// rather than after the whole file is in memory (the member `narrow` kept in f32 if it is
/// stored so); `None` for anything else (the whole-file read then reads it or says what is
/// wrong).
fn streamed_npz(path: &Path, narrow: Option<&str>, wanted: Wanted<'_>) -> Option<npz::Streamed> {
    use std::io::{Read, Seek};
    let mut file = crate::input::open_input(path, crate::MAX_TENSOR_BYTES).ok()?;
    // The signature that makes `sniff` call the file an archive.
    let mut first = [0u8; 4];
    file.read_exact(&mut first).ok()?;
    if &first != b"PK\x03\x04" {
        return None;
    }
    file.rewind().ok()?;
    npz::read_streamed(path, &mut file, narrow, wanted)
}

/// Write tensors in a format, stored as `dtype` (F32 or F64), atomically: a reader never sees a
/// half-written file. A `.npy` takes exactly one tensor (its name is not stored). Replaces an
/// existing regular file; [`write_tensor_file`] says what may be replaced.
pub fn write_tensors(
    path: &Path,
    format: FileFormat,
    tensors: &[Tensor],
    dtype: DType,
) -> Result<(), TensorFileError> {
    write_tensor_file(path, format, tensors, dtype, crate::Existing::Replace)
}

/// [`write_tensors`], with what an existing file at `path` allows (see [`crate::write_file`]).
pub fn write_tensor_file(
    path: &Path,
    format: FileFormat,
    tensors: &[Tensor],
    dtype: DType,
    existing: crate::Existing,
) -> Result<(), TensorFileError> {
    if !matches!(dtype, DType::F32 | DType::F64) {
        return Err(TensorFileError::WriteDType {
            path: path.to_path_buf(),
            dtype,
        });
    }
    check_for_writing(path, format, tensors)?;
    let bytes = match format {
        FileFormat::Npy => match tensors {
            [tensor] => npy::write(tensor, dtype),
            _ => {
                return Err(TensorFileError::BadTensor {
                    path: path.to_path_buf(),
                    tensor: tensors.first().map(|t| t.name.clone()).unwrap_or_default(),
                    problem: format!(
                        "an NPY file holds exactly one tensor, and {} were given; write an .npz \
                         or .safetensors file instead",
                        tensors.len()
                    ),
                });
            }
        },
        FileFormat::Npz => npz::write(path, tensors, dtype)?,
        FileFormat::Safetensors => safetensors_file::write(path, tensors, dtype)?,
    };
    crate::write_file(path, &bytes, existing).map_err(|source| TensorFileError::Io {
        path: path.to_path_buf(),
        action: "write",
        source,
    })
}

/// Refuse tensors whose data does not fill their shape, and repeated names, before any bytes are
/// produced: either would make a file that reads back as something else.
fn check_for_writing(
    path: &Path,
    format: FileFormat,
    tensors: &[Tensor],
) -> Result<(), TensorFileError> {
    let mut seen = std::collections::HashSet::new();
    for tensor in tensors {
        if format == FileFormat::Safetensors && tensor.name == "__metadata__" {
            // The header's key for free-form metadata: a tensor under it makes a file that no
            // safetensors reader opens.
            return Err(TensorFileError::BadTensor {
                path: path.to_path_buf(),
                tensor: tensor.name.clone(),
                problem: "safetensors reserves this name for the file's metadata, so no tensor \
                          may have it; rename the parameter, or write an .npz file"
                    .into(),
            });
        }
        let elements = tensor
            .shape
            .iter()
            .try_fold(1usize, |acc, &d| acc.checked_mul(d));
        if elements != Some(tensor.data.len()) {
            return Err(TensorFileError::BadTensor {
                path: path.to_path_buf(),
                tensor: tensor.name.clone(),
                problem: format!(
                    "its shape {} does not match its {} values",
                    shape_text(&tensor.shape),
                    tensor.data.len()
                ),
            });
        }
        if !seen.insert(tensor.name.as_str()) {
            return Err(TensorFileError::BadTensor {
                path: path.to_path_buf(),
                tensor: tensor.name.clone(),
                problem: "the name is given twice; tensor names in a file must be unique".into(),
            });
        }
    }
    Ok(())
}

/// What the bytes look like, judged by magic numbers only. `None` when nothing is recognised:
/// the reader for the extension then says what is wrong in its own terms.
fn sniff(bytes: &[u8]) -> Option<FileFormat> {
    if bytes.starts_with(npy::MAGIC) {
        return Some(FileFormat::Npy);
    }
    // Local file header, or the end record of an empty archive.
    if bytes.starts_with(b"PK\x03\x04") || bytes.starts_with(b"PK\x05\x06") {
        return Some(FileFormat::Npz);
    }
    // An 8-byte little-endian header length that fits in the file, then a JSON object.
    if let (Some(len), Some(b'{')) = (bytes.get(..8), bytes.get(8)) {
        let len = u64::from_le_bytes(len.try_into().ok()?);
        if len <= bytes.len() as u64 - 8 {
            return Some(FileFormat::Safetensors);
        }
    }
    None
}
