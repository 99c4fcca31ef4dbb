//! NPZ archives: a zip of `.npy` members, stored (`np.savez`) or deflated (`np.savez_compressed`),
//! read from bytes in memory. NumPy writes every member with a zip64 extra field; the `zip` crate
//! reads those as it reads any other.
//!
//! A member's declared sizes are checked before anything is inflated, and inflation is capped at
//! the declared size, so a crafted archive cannot make us allocate more than deflate could really
//! have produced from the bytes in the file.

use std::collections::HashSet;
use std::fs::File;
use std::io::{Cursor, Read, Write};
use std::path::Path;

use zip::write::SimpleFileOptions;
use zip::{CompressionMethod, ZipArchive, ZipWriter};

use crate::npy;
use crate::tensor::{DType, Tensor, TensorFileError, Unread};
use crate::tensor_file::Seen;

/// Deflate's longest match (258 bytes) takes at least two bits to encode, so a stream inflates at
/// most 1032-fold. A member declaring more than that for its compressed size is lying.
const DEFLATE_MAX_RATIO: u64 = 1032;

/// Slack for the stream's own framing on tiny members.
const DEFLATE_SLACK: u64 = 1024;

/// Read the members of an archive, in archive order, each named after its member without
/// `.npy`: those whose name is `wanted` whole, the others from their NPY headers alone (a
/// deflated one inflated only as far as its header), their values neither inflated nor
/// widened. Every member's name, entry and header are checked alike.
pub(crate) fn read(
    path: &Path,
    bytes: &[u8],
    wanted: Wanted<'_>,
) -> Result<(Vec<Tensor>, Vec<Unread>), TensorFileError> {
    let zip_error = |member: Option<String>, source| TensorFileError::Zip {
        path: path.to_path_buf(),
        member,
        source,
    };
    let mut archive = ZipArchive::new(Cursor::new(bytes)).map_err(|e| zip_error(None, e))?;
    if archive.has_duplicate_names() {
        return Err(TensorFileError::DuplicateMembers {
            path: path.to_path_buf(),
        });
    }

    // Before anything is inflated: no byte may be listed under two names.
    let file_len = bytes.len() as u64;
    if let Some((member, listed)) =
        sharing_member(&mut archive, file_len).map_err(|e| zip_error(None, e))?
    {
        return Err(TensorFileError::BadMember {
            path: path.to_path_buf(),
            member,
            problem: shared_bytes(listed, file_len),
        });
    }

    let mut tensors = Vec::with_capacity(archive.len());
    let mut unread = Vec::new();
    let mut names = HashSet::new();
    for index in 0..archive.len() {
        let listed = archive
            .name_for_index(index)
            .and_then(Result::ok)
            .map(|name| name.into_owned());
        let mut file = archive.by_index(index).map_err(|e| zip_error(listed, e))?;
        let member = String::from_utf8_lossy(file.name_raw()).into_owned();
        let bad = |problem: String| TensorFileError::BadMember {
            path: path.to_path_buf(),
            member: member.clone(),
            problem,
        };
        let Some(name) = member.strip_suffix(".npy") else {
            return Err(bad(
                "an NPZ archive holds only `.npy` members, and this is not one; remove it from \
                 the archive or write the archive again with np.savez"
                    .to_string(),
            ));
        };
        let name = name.to_string();
        if !names.insert(name.clone()) {
            return Err(bad(format!(
                "a second array named `{name}`; array names in an archive must be unique"
            )));
        }

        let declared = file.size();
        let compressed = file.compressed_size();
        let limit = match file.compression() {
            CompressionMethod::Stored if declared != compressed => {
                return Err(bad(format!(
                    "stored uncompressed, it declares {declared} bytes of content in \
                     {compressed} stored bytes; the archive is damaged — write it again"
                )));
            }
            CompressionMethod::Stored => declared,
            CompressionMethod::Deflated => {
                let most = compressed
                    .saturating_mul(DEFLATE_MAX_RATIO)
                    .saturating_add(DEFLATE_SLACK);
                if declared > most {
                    return Err(bad(format!(
                        "it declares {declared} bytes inflated from {compressed} compressed \
                         bytes, more than deflate can produce (at most {most}); the \
                         archive is damaged — write it again"
                    )));
                }
                declared
            }
            other => {
                return Err(bad(format!(
                    "compressed with {other}, which plumb does not read; write the archive with \
                     np.savez or np.savez_compressed (stored or deflate)"
                )));
            }
        };
        let used = wanted(&name);
        // A stored member is read where it lies in the file's bytes, not copied out first (a
        // batch of 8,192 images is 51 MB); its checksum is verified as the zip reader would.
        if used && file.compression() == CompressionMethod::Stored {
            let content = file
                .data_start()
                .and_then(|start| usize::try_from(start).ok())
                .zip(usize::try_from(declared).ok())
                .and_then(|(start, len)| bytes.get(start..start.checked_add(len)?));
            if let Some(content) = content {
                if crc32fast::hash(content) != file.crc32() {
                    return Err(bad(
                        "its stored bytes do not match the archive's checksum for them; the \
                         archive is damaged — write it again"
                            .to_string(),
                    ));
                }
                drop(file);
                tensors.push(npy::read(path, Some(&member), &name, content)?);
                continue;
            }
        }
        // Inflate no more than the member's own NPY header declares (header and data), so a
        // stream that inflates far past its array costs nothing: first the preamble, then the
        // header, then the data it declares, and one byte more to tell an over-long stream.
        let mut content = Vec::new();
        let mut inflate = |content: &mut Vec<u8>, upto: usize| {
            let more = (upto.min(limit as usize)).saturating_sub(content.len());
            file.by_ref()
                .take(more as u64)
                .read_to_end(content)
                .map_err(|e| {
                    bad(format!(
                        "cannot inflate it: {e}; the archive is damaged — write it again"
                    ))
                })
        };
        inflate(&mut content, 12)?;
        let Some(end) = npy::header_end(&content) else {
            // Not an NPY preamble: these bytes are enough to say what is wrong.
            return Err(npy::read(path, Some(&member), &name, &content)
                .err()
                .unwrap_or_else(|| bad("it is not an NPY array".into())));
        };
        {
            if end > npy::MAX_MEMBER_HEADER {
                return Err(bad(format!(
                    "its NPY header declares {end} bytes, past the {} plumb reads in an archive; \
                     a malformed archive — write it again with np.savez",
                    npy::MAX_MEMBER_HEADER
                )));
            }
            inflate(&mut content, end)?;
            if !used {
                // The header alone: what a listing needs, checked as a read would check it.
                let (shape, dtype) = npy::head(path, &member, &name, &content, declared)?;
                drop(file);
                unread.push(Unread {
                    name,
                    shape,
                    dtype,
                    after: tensors.len(),
                });
                continue;
            }
            if content.len() == end {
                let whole = npy::declared_len(path, Some(&member), &name, &content)?;
                inflate(&mut content, whole.saturating_add(1))?;
                if content.len() > whole {
                    return Err(bad(format!(
                        "it inflates past the {whole} bytes its NPY header declares (the header \
                         and the data of its shape and dtype), toward the {declared} the zip \
                         entry claims; a malformed archive — write it again with np.savez"
                    )));
                }
            }
        }
        inflate(&mut content, (limit as usize).saturating_add(1))?;
        if content.len() as u64 != declared {
            return Err(bad(format!(
                "it declares {declared} bytes but holds {}{}; the archive is damaged — \
                 write it again",
                if content.len() as u64 > declared {
                    "more than "
                } else {
                    ""
                },
                content.len().min(limit as usize)
            )));
        }
        drop(file);
        tensors.push(npy::read(path, Some(&member), &name, &content)?);
    }
    Ok((tensors, unread))
}

/// Which names of a file's tensors a reader will use: the others are listed, not read.
pub(crate) type Wanted<'a> = &'a dyn Fn(&str) -> bool;

/// The member at which the archive's listed member bytes pass the file's `file_len`, with the
/// count so far: `Some` when its directory lists some bytes under several names (what
/// [`shared_bytes`] says); read from the directory and local headers alone, before any member.
fn sharing_member<R: Read + std::io::Seek>(
    archive: &mut ZipArchive<R>,
    file_len: u64,
) -> zip::result::ZipResult<Option<(String, u64)>> {
    let mut listed = 0u64;
    for index in 0..archive.len() {
        let raw = archive.by_index_raw(index)?;
        listed = listed.saturating_add(raw.compressed_size());
        if listed > file_len {
            return Ok(Some((
                String::from_utf8_lossy(raw.name_raw()).into_owned(),
                listed,
            )));
        }
    }
    Ok(None)
}

/// What is wrong with an archive whose members' bytes add up to more than the file holds: its
/// directory lists some bytes under several names, and each name would be read (and widened)
/// again — a file of a few kilobytes could ask for gigabytes.
fn shared_bytes(listed: u64, file: u64) -> String {
    format!(
        "the archive's members list at least {listed} bytes, more than the file's {file}: entries \
         share their bytes, which no archive NumPy writes does; the archive is damaged or \
         crafted — write it again with np.savez"
    )
}

/// The first bytes of a streamed member read before its header is parsed: NumPy's headers take
/// 128 bytes (a longer one falls back to the whole-file read).
const HEAD: usize = 4096;

/// Every member of an archive of stored members, read from the open file a piece at a time
/// (what [`read`] does from the file's bytes, without the whole file in memory first). `None`
/// when the archive is anything else — a deflated or damaged member, a duplicate or odd name,
/// a failed read: the caller then reads the file whole and [`read`] reports what it finds.
/// With each tensor, what [`npy::read_streamed`] found of its values' finiteness.
pub(crate) fn read_streamed(
    path: &Path,
    file: &mut File,
    narrow: Option<&str>,
    wanted: Wanted<'_>,
) -> Option<Streamed> {
    let file_len = file.metadata().ok()?.len();
    let mut archive = ZipArchive::new(&mut *file).ok()?;
    if archive.has_duplicate_names() {
        return None;
    }
    // Members sharing bytes: the whole-file read says what is wrong.
    if sharing_member(&mut archive, file_len).ok()?.is_some() {
        return None;
    }
    let mut read = Streamed {
        tensors: Vec::with_capacity(archive.len()),
        narrow: None,
        unread: Vec::new(),
    };
    let mut names = HashSet::new();
    for index in 0..archive.len() {
        let raw = archive.by_index_raw(index).ok()?;
        let member = std::str::from_utf8(raw.name_raw()).ok()?.to_string();
        let name = member.strip_suffix(".npy")?.to_string();
        let len = raw.size();
        // The member's bytes must lie inside the file: that bounds what is allocated for them.
        let inside = raw
            .data_start()
            .and_then(|start| start.checked_add(len))
            .is_some_and(|end| end <= file_len);
        // An encrypted member: the whole-file read refuses it, naming the member.
        if !names.insert(name.clone())
            || raw.compression() != CompressionMethod::Stored
            || raw.encrypted()
            || len != raw.compressed_size()
            || !inside
        {
            return None;
        }
        let crc = raw.crc32();
        let len = usize::try_from(len).ok()?;
        let mut content = Checksummed {
            inner: raw,
            crc: crc32fast::Hasher::new(),
        };
        let mut head = vec![0; len.min(HEAD)];
        content.read_exact(&mut head).ok()?;
        if !wanted(&name) {
            // Its header alone, whole within the first bytes (else the whole read lists it).
            if npy::header_end(&head).is_none_or(|end| end > head.len()) {
                return None;
            }
            let (shape, dtype) = npy::head(path, &member, &name, &head, len as u64).ok()?;
            read.unread.push(Unread {
                name,
                shape,
                dtype,
                after: read.tensors.len(),
            });
            continue;
        }
        let kept = narrow == Some(name.as_str())
            && npy::head_dtype(path, &name, &head).is_some_and(<f32 as npy::Element>::holds);
        if kept {
            let member = npy::read_streamed(path, &member, &name, &head, &mut content, len)?;
            read.narrow = Some((read.tensors.len() + read.unread.len(), member));
        } else {
            let member = npy::read_streamed(path, &member, &name, &head, &mut content, len)?;
            read.tensors.push(member);
        }
        if content.crc.finalize() != crc {
            return None;
        }
    }
    Some(read)
}

/// The shape each member's NPY header declares, read from the first bytes of each member alone
/// (a deflated member is inflated only that far): what an archive holds, before any of it is
/// read. `None` where anything does not read cleanly: the whole read then says what is wrong.
pub(crate) fn declared_shapes(path: &Path) -> Option<Vec<(String, Vec<usize>)>> {
    let file = crate::input::open_input(path, crate::MAX_TENSOR_BYTES).ok()?;
    let mut archive = ZipArchive::new(file).ok()?;
    let mut out = Vec::with_capacity(archive.len().min(1 << 16));
    for index in 0..archive.len() {
        let member = archive.by_index(index).ok()?;
        let name = std::str::from_utf8(member.name_raw())
            .ok()?
            .strip_suffix(".npy")?
            .to_string();
        let mut head = Vec::with_capacity(HEAD);
        member.take(HEAD as u64).read_to_end(&mut head).ok()?;
        out.push((name.clone(), npy::head_shape(path, &name, &head)?));
    }
    Some(out)
}

/// The members of a streamed archive: each widened to f64 with what was seen of its values'
/// finiteness, and the member asked for in f32 when it is stored in f32, with the number of
/// members before it in the archive (read or not); those not wanted from their headers alone,
/// each placed among the others (`after`, the kept member not counted).
pub(crate) struct Streamed {
    pub tensors: Vec<(Tensor, Seen)>,
    pub narrow: Option<(usize, (Tensor<f32>, Seen))>,
    pub unread: Vec<Unread>,
}

/// A reader that keeps the CRC-32 of what it has read (the archive's checksum of a member).
struct Checksummed<R> {
    inner: R,
    crc: crc32fast::Hasher,
}

impl<R: Read> Read for Checksummed<R> {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        let n = self.inner.read(buf)?;
        self.crc.update(&buf[..n]);
        Ok(n)
    }
}

/// Serialise tensors as a stored (uncompressed) archive, the way `np.savez` does, in the given
/// order. Gradients and weights are dense floats that deflate shrinks by a few per cent at most,
/// and deflating took three quarters of `plumb grad -o` on a 235,146-parameter network
/// (benches/grad-cli.sh); either kind of archive reads back anywhere NumPy does.
pub(crate) fn write(
    path: &Path,
    tensors: &[Tensor],
    dtype: DType,
) -> Result<Vec<u8>, TensorFileError> {
    // Zip errors here can only come from the in-memory writer; report them as a failed write.
    let failed = |e: zip::result::ZipError| TensorFileError::Io {
        path: path.to_path_buf(),
        action: "write",
        source: std::io::Error::other(e),
    };
    let mut writer = ZipWriter::new(Cursor::new(Vec::new()));
    for tensor in tensors {
        let content = npy::write(tensor, dtype);
        let options = SimpleFileOptions::default()
            .compression_method(CompressionMethod::Stored)
            .large_file(content.len() as u64 >= u32::MAX as u64);
        writer
            .start_file(format!("{}.npy", tensor.name), options)
            .map_err(failed)?;
        writer
            .write_all(&content)
            .map_err(|source| TensorFileError::Io {
                path: path.to_path_buf(),
                action: "write",
                source,
            })?;
    }
    Ok(writer.finish().map_err(failed)?.into_inner())
}
