//! Writing a file so that a reader sees either the old content or the new, never half of the new:
//! an interrupted `plumb grad -o` must not leave a truncated gradient file that a later `compare`
//! would trust.

use std::fs::{self, File, OpenOptions};
use std::io::{self, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};

/// Distinguishes temporary files of one process (several writes may run at once in tests).
static COUNTER: AtomicU64 = AtomicU64::new(0);

/// Write `bytes` to `path` atomically: into a temporary file in the same directory (so the rename
/// stays on one file system), flushed to disk, then renamed over the target. The temporary file is
/// removed if anything fails. An existing target is replaced: whether that is allowed is the
/// caller's decision.
pub fn write_atomically(path: &Path, bytes: &[u8]) -> io::Result<()> {
    let file_name = path.file_name().ok_or_else(|| {
        io::Error::new(
            io::ErrorKind::InvalidInput,
            format!("`{}` does not name a file", path.display()),
        )
    })?;
    let dir = match path.parent() {
        Some(dir) if !dir.as_os_str().is_empty() => dir.to_path_buf(),
        _ => PathBuf::from("."),
    };
    // Keep the target's permissions when replacing it; a new file gets the usual defaults.
    let permissions = fs::metadata(path).ok().map(|m| m.permissions());

    let (temp_path, mut file) = create_temp(&dir, &file_name.to_string_lossy())?;
    let result = (|| {
        file.write_all(bytes)?;
        if let Some(permissions) = permissions {
            file.set_permissions(permissions)?;
        }
        file.sync_all()?;
        drop(file);
        fs::rename(&temp_path, path)
    })();
    if result.is_err() {
        let _ = fs::remove_file(&temp_path);
        return result;
    }
    // Make the rename itself durable. Not every platform can open a directory; the data is
    // already safe in the file, so a failure here is not worth failing the write over.
    if let Ok(dir) = File::open(&dir) {
        let _ = dir.sync_all();
    }
    Ok(())
}

/// Create `.{file}.plumb-tmp-{pid}-{n}` exclusively, trying the next `n` if a stale one exists.
fn create_temp(dir: &Path, file_name: &str) -> io::Result<(PathBuf, File)> {
    let pid = std::process::id();
    let mut last_error = None;
    for _ in 0..100 {
        let n = COUNTER.fetch_add(1, Ordering::Relaxed);
        let temp_path = dir.join(format!(".{file_name}.plumb-tmp-{pid}-{n}"));
        match OpenOptions::new()
            .write(true)
            .create_new(true)
            .open(&temp_path)
        {
            Ok(file) => return Ok((temp_path, file)),
            Err(e) if e.kind() == io::ErrorKind::AlreadyExists => last_error = Some(e),
            Err(e) => return Err(e),
        }
    }
    Err(last_error.unwrap_or_else(|| io::Error::other("could not create a temporary file")))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn scratch(name: &str) -> PathBuf {
        let dir = std::env::temp_dir().join(format!("plumb-atomic-{}-{name}", std::process::id()));
        let _ = fs::remove_dir_all(&dir);
        fs::create_dir_all(&dir).unwrap();
        dir
    }

    #[test]
    fn replaces_an_existing_file_and_leaves_no_temporary_behind() {
        let dir = scratch("replace");
        let target = dir.join("out.npy");
        fs::write(&target, b"old").unwrap();
        write_atomically(&target, b"new content").unwrap();
        assert_eq!(fs::read(&target).unwrap(), b"new content");
        let names: Vec<_> = fs::read_dir(&dir)
            .unwrap()
            .map(|e| e.unwrap().file_name())
            .collect();
        assert_eq!(names, vec![std::ffi::OsString::from("out.npy")]);
        fs::remove_dir_all(&dir).unwrap();
    }

    #[test]
    fn failure_removes_the_temporary_file() {
        let dir = scratch("failure");
        // Renaming a file over a non-empty directory fails after the temporary file was written.
        let target = dir.join("occupied");
        fs::create_dir_all(target.join("inside")).unwrap();
        assert!(write_atomically(&target, b"data").is_err());
        let names: Vec<_> = fs::read_dir(&dir)
            .unwrap()
            .map(|e| e.unwrap().file_name())
            .collect();
        assert_eq!(names, vec![std::ffi::OsString::from("occupied")]);
        fs::remove_dir_all(&dir).unwrap();
    }
}
