//! Entry points for the fuzz targets (fuzz/) and for the tests that replay their corpora: bytes in,
//! through the same readers the commands use. Files are read by path, so the bytes go through a
//! temporary file named with the extension that picks the reader.

use std::path::PathBuf;
use std::sync::atomic::{AtomicU64, Ordering};

use crate::{GraphDescription, read_data, read_tensors, read_tensors_for};

/// A temporary file of this process and call, with extension `ext`.
fn temp(ext: &str, bytes: &[u8]) -> PathBuf {
    static N: AtomicU64 = AtomicU64::new(0);
    let path = std::env::temp_dir().join(format!(
        "plumb-fuzz-{}-{}.{ext}",
        std::process::id(),
        N.fetch_add(1, Ordering::Relaxed)
    ));
    std::fs::write(&path, bytes).expect("the temporary directory is writable");
    path
}

/// Reads `bytes` as a tensor file of extension `ext` (npy, npz, safetensors); the message of the
/// error, if any.
pub fn tensors(ext: &str, bytes: &[u8]) -> Result<usize, String> {
    let path = temp(ext, bytes);
    let whole = read_tensors(&path);
    // Every tensor listed from its header alone: a file that reads lists the same names,
    // shapes and dtypes in the same order (a listing checks less, so it may list what does
    // not read).
    let listed = read_tensors_for(&path, &|_| false);
    let _ = std::fs::remove_file(&path);
    if let Ok(whole) = &whole {
        let listed = listed.unwrap_or_else(|e| panic!("reads whole but not listed: {e}"));
        assert!(
            whole.listing().eq(listed.listing()),
            "the listing is not the file's tensors"
        );
    }
    whole.map(|f| f.tensors.len()).map_err(|e| e.to_string())
}

/// Reads `bytes[2..]` as a data file of extension `ext` (csv, npz) for a network of
/// `1 + bytes[0] % 8` inputs and `1 + bytes[1] % 4` outputs.
pub fn data(ext: &str, bytes: &[u8]) -> Result<usize, String> {
    let [a, b, rest @ ..] = bytes else {
        return Err("too short".into());
    };
    let path = temp(ext, rest);
    let out = read_data(&path, 1 + *a as usize % 8, 1 + *b as usize % 4)
        .map(|batch| batch.x.nrows())
        .map_err(|e| e.to_string());
    let _ = std::fs::remove_file(&path);
    out
}

/// Parses `bytes` as a network description of any kind (invalid UTF-8 is refused as the reader
/// refuses it); the graph's layer count, or the reader's message.
pub fn description(bytes: &[u8]) -> Result<usize, String> {
    let text = std::str::from_utf8(bytes).map_err(|e| e.to_string())?;
    let path = std::path::Path::new("fuzz.toml");
    GraphDescription::parse(path, text)
        .map(|d| d.layers.len())
        .map_err(|e| e.to_string())
}
