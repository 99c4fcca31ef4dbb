//! Reading an input file whole, after making sure it is one: a device (`/dev/zero`), a pipe or a
//! directory would make a read unbounded or hang, so only regular files are read, and never more
//! than the limit for their kind even if the file grows while it is read.

use std::fs::File;
use std::io::{self, Read};
use std::path::Path;

/// The bytes of a regular file, refusing anything else and anything larger than `limit` bytes.
/// The path is examined before it is opened (opening a FIFO would block until a writer came).
pub fn read_input(path: &Path, limit: u64) -> io::Result<Vec<u8>> {
    regular(&std::fs::metadata(path)?, limit)?;
    let file = File::open(path)?;
    // The same checks on what was opened: the path may have been replaced in between.
    let len = regular(&file.metadata()?, limit)?;
    // Asked of the allocator fallibly: a file within the limit may still be more than this
    // machine (or a memory limit) can hold, which is a refusal, not an abort.
    let mut bytes = Vec::new();
    bytes.try_reserve_exact(len as usize).map_err(|_| {
        io::Error::new(
            io::ErrorKind::OutOfMemory,
            format!(
                "its {len} bytes do not fit in the memory plumb can have; is it the file you meant?"
            ),
        )
    })?;
    file.take(limit.saturating_add(1)).read_to_end(&mut bytes)?;
    if bytes.len() as u64 > limit {
        return Err(too_large(bytes.len() as u64, limit));
    }
    Ok(bytes)
}

/// A regular file of at most `limit` bytes, opened for streaming (the same checks as
/// [`read_input`]; the reader must still stop at `limit`, as the file may grow).
pub(crate) fn open_input(path: &Path, limit: u64) -> io::Result<File> {
    regular(&std::fs::metadata(path)?, limit)?;
    let file = File::open(path)?;
    regular(&file.metadata()?, limit)?;
    Ok(file)
}

/// Refuses what is not a regular file of at most `limit` bytes; returns its length.
pub(crate) fn regular(meta: &std::fs::Metadata, limit: u64) -> io::Result<u64> {
    if !meta.is_file() {
        let what = if meta.is_dir() {
            "a directory"
        } else {
            "not a regular file (a device or a pipe?)"
        };
        return Err(io::Error::new(
            io::ErrorKind::InvalidInput,
            format!("it is {what}; give a file"),
        ));
    }
    if meta.len() > limit {
        return Err(too_large(meta.len(), limit));
    }
    Ok(meta.len())
}

fn too_large(len: u64, limit: u64) -> io::Error {
    io::Error::new(
        io::ErrorKind::InvalidInput,
        format!("it is {len} bytes or more, past the {limit} plumb reads for this kind of file"),
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn devices_and_directories_are_refused() {
        let e = read_input(Path::new("/dev/zero"), u64::MAX).unwrap_err();
        assert!(e.to_string().contains("not a regular file"), "{e}");
        let e = read_input(Path::new("/"), u64::MAX).unwrap_err();
        assert!(e.to_string().contains("directory"), "{e}");
    }

    /// A FIFO is refused before it is opened: opening one waits for a writer forever.
    #[test]
    fn a_fifo_is_refused_without_hanging() {
        let dir = std::env::temp_dir().join(format!("plumb-fifo-{}", std::process::id()));
        let _ = std::fs::create_dir_all(&dir);
        let fifo = dir.join("pipe");
        let _ = std::fs::remove_file(&fifo);
        let c = std::ffi::CString::new(fifo.to_str().unwrap()).unwrap();
        assert_eq!(unsafe { libc::mkfifo(c.as_ptr(), 0o600) }, 0);
        let e = read_input(&fifo, 1 << 20).unwrap_err();
        assert!(e.to_string().contains("not a regular file"), "{e}");
        std::fs::remove_dir_all(&dir).unwrap();
    }

    #[test]
    fn a_file_past_the_limit_is_refused() {
        let dir = std::env::temp_dir().join(format!("plumb-limit-{}", std::process::id()));
        let _ = std::fs::create_dir_all(&dir);
        let f = dir.join("big");
        std::fs::write(&f, vec![b'x'; 101]).unwrap();
        let e = read_input(&f, 100).unwrap_err();
        assert!(e.to_string().contains("past the 100"), "{e}");
        assert_eq!(read_input(&f, 101).unwrap().len(), 101);
        std::fs::remove_dir_all(&dir).unwrap();
    }
}
