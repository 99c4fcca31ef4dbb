//! safetensors files, through the `safetensors` crate: it validates the header (size, JSON, that
//! the data offsets tile the buffer exactly, with checked arithmetic) before we touch any data.
//!
//! F64, F32, F16 and BF16 are read and widened; integer and bool tensors are converted so a shape
//! audit can still name them. The 8-bit and smaller float formats and complex numbers are refused.

use std::path::Path;

use safetensors::tensor::{Dtype, TensorView};
use safetensors::{SafeTensorError, SafeTensors};

use crate::npy;
use crate::npz::Wanted;
use crate::tensor::{DType, Tensor, TensorFileError, Unread};

/// Read every tensor, in the order of their data offsets (the order they were written in): those
/// whose name is `wanted` widened, the others listed from the header alone.
pub(crate) fn read(
    path: &Path,
    bytes: &[u8],
    wanted: Wanted<'_>,
) -> Result<(Vec<Tensor>, Vec<Unread>), TensorFileError> {
    let (header_len, metadata) = SafeTensors::read_metadata(bytes).map_err(|source| {
        // JSON keeps the last of a repeated name, and the crate then blames the offsets.
        match repeated_name(bytes) {
            Some(tensor) => TensorFileError::RepeatedName {
                path: path.to_path_buf(),
                tensor,
            },
            None => TensorFileError::Safetensors {
                path: path.to_path_buf(),
                hint: hint(&source),
                source,
            },
        }
    })?;
    let data_start = 8 + header_len;
    let (mut tensors, mut unread) = (Vec::new(), Vec::new());
    for name in metadata.offset_keys() {
        let Some(info) = metadata.info(&name) else {
            continue;
        };
        let (start, end) = info.data_offsets;
        let offset = (data_start + start) as u64;
        let dtype = dtype_of(info.dtype).ok_or_else(|| TensorFileError::UnsupportedDType {
            path: path.to_path_buf(),
            member: None,
            tensor: name.clone(),
            offset,
            dtype: format!("{:?} ({})", info.dtype, gloss(info.dtype)),
        })?;
        // read_metadata checked that the offsets tile the data exactly and match each shape.
        let Some(raw) = bytes.get(data_start + start..data_start + end) else {
            return Err(TensorFileError::Safetensors {
                path: path.to_path_buf(),
                hint: "the file is truncated",
                source: SafeTensorError::InvalidOffset(name),
            });
        };
        if !wanted(&name) {
            unread.push(Unread {
                name,
                shape: info.shape.clone(),
                dtype,
                after: tensors.len(),
            });
            continue;
        }
        tensors.push(Tensor {
            name,
            shape: info.shape.clone(),
            dtype,
            data: npy::decode(raw, dtype, false),
        });
    }
    Ok((tensors, unread))
}

fn dtype_of(dtype: Dtype) -> Option<DType> {
    Some(match dtype {
        Dtype::F64 => DType::F64,
        Dtype::F32 => DType::F32,
        Dtype::F16 => DType::F16,
        Dtype::BF16 => DType::BF16,
        Dtype::I8 => DType::I8,
        Dtype::I16 => DType::I16,
        Dtype::I32 => DType::I32,
        Dtype::I64 => DType::I64,
        Dtype::U8 => DType::U8,
        Dtype::U16 => DType::U16,
        Dtype::U32 => DType::U32,
        Dtype::U64 => DType::U64,
        Dtype::BOOL => DType::Bool,
        _ => return None,
    })
}

fn gloss(dtype: Dtype) -> &'static str {
    match dtype {
        Dtype::C64 => "complex",
        _ => "a float format narrower than 16 bits",
    }
}

/// The first name the header's top-level object gives twice, if its JSON reads that far.
fn repeated_name(bytes: &[u8]) -> Option<String> {
    use serde::de::{Deserializer, IgnoredAny, MapAccess, Visitor};
    struct Keys;
    impl<'de> Visitor<'de> for Keys {
        type Value = Option<String>;
        fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
            f.write_str("a JSON object")
        }
        fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<Option<String>, A::Error> {
            // Read to the end: the JSON reader checks the object closes after the visit.
            let (mut seen, mut twice) = (std::collections::HashSet::new(), None);
            while let Some(key) = map.next_key::<String>()? {
                if !seen.insert(key.clone()) && twice.is_none() {
                    twice = Some(key);
                }
                map.next_value::<IgnoredAny>()?;
            }
            Ok(twice)
        }
    }
    let len = usize::try_from(u64::from_le_bytes(bytes.get(..8)?.try_into().ok()?)).ok()?;
    let header = bytes.get(8..8usize.checked_add(len)?)?;
    serde_json::Deserializer::from_slice(header)
        .deserialize_map(Keys)
        .ok()
        .flatten()
}

/// What the crate's error most likely means for the user.
fn hint(error: &SafeTensorError) -> &'static str {
    match error {
        SafeTensorError::HeaderTooSmall
        | SafeTensorError::InvalidHeaderLength
        | SafeTensorError::MetadataIncompleteBuffer => {
            "the file is truncated, has bytes appended, or is not a safetensors file"
        }
        SafeTensorError::HeaderTooLarge => {
            "the header-length field is implausible, so this is probably not a safetensors file"
        }
        SafeTensorError::InvalidHeader(_)
        | SafeTensorError::InvalidHeaderDeserialization(_)
        | SafeTensorError::JsonError(_) => "the JSON header is damaged",
        _ => "the header's shapes, dtypes and data offsets do not agree",
    }
}

/// Serialise tensors as F32 or F64. The crate orders tensors by name within a dtype (as the Python
/// library does), so the file's order is alphabetical, not the order given.
pub(crate) fn write(
    path: &Path,
    tensors: &[Tensor],
    dtype: DType,
) -> Result<Vec<u8>, TensorFileError> {
    let (st_dtype, size) = match dtype {
        DType::F32 => (Dtype::F32, 4),
        _ => (Dtype::F64, 8),
    };
    let buffers: Vec<Vec<u8>> = tensors
        .iter()
        .map(|tensor| {
            let mut raw = Vec::with_capacity(tensor.data.len() * size);
            for &value in &tensor.data {
                if dtype == DType::F32 {
                    raw.extend_from_slice(&(value as f32).to_le_bytes());
                } else {
                    raw.extend_from_slice(&value.to_le_bytes());
                }
            }
            raw
        })
        .collect();
    let mut views = Vec::with_capacity(tensors.len());
    for (tensor, raw) in tensors.iter().zip(&buffers) {
        let view = TensorView::new(st_dtype, tensor.shape.clone(), raw).map_err(|e| {
            TensorFileError::BadTensor {
                path: path.to_path_buf(),
                tensor: tensor.name.clone(),
                problem: e.to_string(),
            }
        })?;
        views.push((tensor.name.clone(), view));
    }
    safetensors::serialize(views, None).map_err(|e| TensorFileError::BadTensor {
        path: path.to_path_buf(),
        tensor: String::new(),
        problem: format!("the safetensors library refused the tensors: {e}"),
    })
}
