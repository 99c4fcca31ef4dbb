//! Reading an input file whole, after making sure it is one: a device (`/dev/zero`), a pipe or a
//! directory would make a read unbounded or hang, so only regular files are read.

use std::io;
use std::path::Path;

/// The bytes of a regular file, refusing anything else and anything larger than `limit` bytes.
pub fn read_input(path: &Path, limit: u64) -> io::Result<Vec<u8>> {
    let meta = std::fs::metadata(path)?;
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
        return Err(io::Error::new(
            io::ErrorKind::InvalidInput,
            format!(
                "it is {} bytes, more than the {limit} plumb reads for this kind of file",
                meta.len()
            ),
        ));
    }
    std::fs::read(path)
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
}
