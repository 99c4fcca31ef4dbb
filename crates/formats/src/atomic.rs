//! Writing a file so that a reader sees either the old content or the new, never half of the new:
//! an interrupted `plumb grad -o` must not leave a truncated gradient file that a later `compare`
//! would trust. A file the user owns is never replaced unasked, and never one that is not a
//! regular file.

use std::ffi::CString;
use std::fs::{self, File, OpenOptions};
use std::io::{self, Write};
use std::os::unix::ffi::OsStrExt;
use std::path::{Path, PathBuf};
use std::sync::Once;
use std::sync::atomic::{AtomicPtr, AtomicU64, Ordering};

/// Distinguishes temporary files of one process (several writes may run at once in tests).
static COUNTER: AtomicU64 = AtomicU64::new(0);

/// What a write may do to a file already at its target. Only a regular file (or a symbolic link,
/// which is replaced, not followed) is ever replaced: a device, a FIFO or a directory never is.
/// A dangling symbolic link counts as a file that exists.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Existing {
    /// Fail if anything is at the target when the file is put in place (checked by the system
    /// at that moment, not earlier: a file created while plumb ran is kept).
    Keep,
    /// Replace a regular file or a symbolic link (`--force`).
    Replace,
}

/// Write `bytes` to `path` atomically, replacing an existing regular file: see [`write_file`].
pub fn write_atomically(path: &Path, bytes: &[u8]) -> io::Result<()> {
    write_file(path, bytes, Existing::Replace)
}

/// Write `bytes` to `path` atomically: into a temporary file in the same directory (so the move
/// stays on one file system), flushed to disk, then put in place — by a hard link, which fails if
/// the target exists, under [`Existing::Keep`]; by a rename over a regular file under
/// [`Existing::Replace`]. The temporary file is removed if anything fails, and on SIGINT or
/// SIGTERM while it exists.
pub fn write_file(path: &Path, bytes: &[u8], existing: Existing) -> io::Result<()> {
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
    let present = match fs::symlink_metadata(path) {
        Ok(meta) => Some(meta),
        Err(e) if e.kind() == io::ErrorKind::NotFound => None,
        Err(e) => return Err(e),
    };
    if let Some(meta) = &present {
        refuse_existing(meta, existing)?;
    }
    // Keep the target's permissions when replacing a file; a new file gets the usual defaults.
    let permissions = present
        .as_ref()
        .filter(|m| m.is_file())
        .map(|m| m.permissions());

    let (temp_path, mut file) = create_temp(&dir, &file_name.to_string_lossy())?;
    let slot = cleanup::register(&temp_path);
    let result = (|| {
        file.write_all(bytes)?;
        if let Some(permissions) = permissions {
            file.set_permissions(permissions)?;
        }
        file.sync_all()?;
        drop(file);
        match (existing, present.is_some()) {
            (Existing::Replace, true) => fs::rename(&temp_path, path),
            // link(2) refuses an existing target, a dangling symbolic link included.
            _ => fs::hard_link(&temp_path, path).map_err(|e| {
                if e.kind() == io::ErrorKind::AlreadyExists {
                    exists_error()
                } else {
                    e
                }
            }),
        }
    })();
    let _ = fs::remove_file(&temp_path);
    cleanup::release(slot);
    result?;
    // Make the move itself durable. Not every platform can open a directory; the data is
    // already safe in the file, so a failure here is not worth failing the write over.
    if let Ok(dir) = File::open(&dir) {
        let _ = dir.sync_all();
    }
    Ok(())
}

fn exists_error() -> io::Error {
    io::Error::new(
        io::ErrorKind::AlreadyExists,
        "the file exists (it may have appeared while plumb ran); pass --force to replace it, or \
         choose another name",
    )
}

/// Refuses to put a file where a non-regular one is, and any file without leave to replace it.
fn refuse_existing(meta: &fs::Metadata, existing: Existing) -> io::Result<()> {
    let kind = meta.file_type();
    if kind.is_dir() {
        return Err(io::Error::new(
            io::ErrorKind::IsADirectory,
            "it is a directory; give a file name",
        ));
    }
    if !kind.is_file() && !kind.is_symlink() {
        return Err(io::Error::new(
            io::ErrorKind::InvalidInput,
            "it is not a regular file (a device, a FIFO or a socket), and plumb replaces only \
             regular files, even with --force; give another name",
        ));
    }
    if existing == Existing::Keep {
        return Err(exists_error());
    }
    Ok(())
}

/// The prefix of every temporary file for `file_name`: `.{file_name}.plumb-tmp-`.
fn temp_prefix(file_name: &str) -> String {
    format!(".{file_name}.plumb-tmp-")
}

/// Create `.{file}.plumb-tmp-{pid}-{n}` exclusively, trying the next `n` if a stale one exists.
fn create_temp(dir: &Path, file_name: &str) -> io::Result<(PathBuf, File)> {
    let pid = std::process::id();
    let mut last_error = None;
    for _ in 0..100 {
        let n = COUNTER.fetch_add(1, Ordering::Relaxed);
        let temp_path = dir.join(format!("{}{pid}-{n}", temp_prefix(file_name)));
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

/// Temporary files left beside `path` by runs that were killed before they could remove them
/// (`.NAME.plumb-tmp-PID-N` whose process no longer exists), for the next run to name.
pub fn leftovers(path: &Path) -> Vec<PathBuf> {
    let Some(name) = path.file_name() else {
        return Vec::new();
    };
    let prefix = temp_prefix(&name.to_string_lossy());
    let dir = match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d,
        _ => Path::new("."),
    };
    let Ok(entries) = fs::read_dir(dir) else {
        return Vec::new();
    };
    let mut out: Vec<PathBuf> = entries
        .flatten()
        .filter(|e| {
            let n = e.file_name();
            let Some(rest) = n.to_str().and_then(|n| n.strip_prefix(&prefix)) else {
                return false;
            };
            let pid = rest.split('-').next().and_then(|p| p.parse::<i32>().ok());
            pid.is_some_and(|p| p > 0 && !alive(p))
        })
        .map(|e| e.path())
        .collect();
    out.sort();
    out
}

/// Whether a process exists (signal 0 checks without sending; EPERM means it exists).
fn alive(pid: i32) -> bool {
    // SAFETY: kill with signal 0 only checks that the process exists.
    let r = unsafe { libc::kill(pid, 0) };
    r == 0 || io::Error::last_os_error().raw_os_error() == Some(libc::EPERM)
}

/// Removing temporary files when the run is interrupted: their paths sit in a fixed table the
/// signal handler reads without locks or allocation (only `unlink` is called there).
mod cleanup {
    use super::*;

    const SLOTS: usize = 64;
    static PATHS: [AtomicPtr<libc::c_char>; SLOTS] =
        [const { AtomicPtr::new(std::ptr::null_mut()) }; SLOTS];
    static INSTALL: Once = Once::new();

    /// Records a temporary file; returns its slot (none if the table is full: the file is then
    /// only removed on the normal paths).
    pub(super) fn register(path: &Path) -> Option<usize> {
        INSTALL.call_once(install);
        let c = CString::new(path.as_os_str().as_bytes()).ok()?.into_raw();
        for (i, slot) in PATHS.iter().enumerate() {
            if slot
                .compare_exchange(std::ptr::null_mut(), c, Ordering::AcqRel, Ordering::Acquire)
                .is_ok()
            {
                return Some(i);
            }
        }
        // SAFETY: `c` came from into_raw above and was not stored.
        drop(unsafe { CString::from_raw(c) });
        None
    }

    /// Forgets a temporary file that was removed or renamed. The string is leaked rather than
    /// freed: a handler running at this moment may still be reading it.
    pub(super) fn release(slot: Option<usize>) {
        if let Some(i) = slot {
            PATHS[i].store(std::ptr::null_mut(), Ordering::Release);
        }
    }

    extern "C" fn on_signal(signal: libc::c_int) {
        for slot in &PATHS {
            let p = slot.load(Ordering::Acquire);
            if !p.is_null() {
                // SAFETY: unlink is async-signal-safe; p is a NUL-terminated string never freed.
                unsafe { libc::unlink(p) };
            }
        }
        // SAFETY: restore the default action and raise again, so the process ends as the
        // signal asked (and its parent sees it was signalled).
        unsafe {
            libc::signal(signal, libc::SIG_DFL);
            libc::raise(signal);
        }
    }

    fn install() {
        for signal in [libc::SIGINT, libc::SIGTERM] {
            // SAFETY: installing a handler that only calls async-signal-safe functions. A
            // signal the parent set to be ignored stays ignored.
            unsafe {
                let previous = libc::signal(signal, on_signal as *const () as libc::sighandler_t);
                if previous == libc::SIG_IGN {
                    libc::signal(signal, libc::SIG_IGN);
                }
            }
        }
    }
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

    /// The target is checked when the file is put in place, not before: one created meanwhile
    /// (here, before the call) is kept without leave to replace it.
    #[test]
    fn a_file_that_exists_at_write_time_is_kept_without_replace() {
        let dir = scratch("keep");
        let target = dir.join("out.json");
        fs::write(&target, b"theirs").unwrap();
        let e = write_file(&target, b"ours", Existing::Keep).unwrap_err();
        assert_eq!(e.kind(), io::ErrorKind::AlreadyExists);
        assert_eq!(fs::read(&target).unwrap(), b"theirs");
        write_file(&dir.join("new.json"), b"ours", Existing::Keep).unwrap();
        let mut names: Vec<_> = fs::read_dir(&dir)
            .unwrap()
            .map(|e| e.unwrap().file_name().into_string().unwrap())
            .collect();
        names.sort();
        assert_eq!(names, ["new.json", "out.json"]);
        fs::remove_dir_all(&dir).unwrap();
    }

    #[test]
    fn a_dangling_symlink_counts_as_existing() {
        let dir = scratch("dangling");
        let link = dir.join("out.xml");
        std::os::unix::fs::symlink(dir.join("nowhere"), &link).unwrap();
        let e = write_file(&link, b"x", Existing::Keep).unwrap_err();
        assert_eq!(e.kind(), io::ErrorKind::AlreadyExists);
        assert!(
            fs::symlink_metadata(&link)
                .unwrap()
                .file_type()
                .is_symlink()
        );
        // With leave, the link itself is replaced; nothing is written where it pointed.
        write_file(&link, b"x", Existing::Replace).unwrap();
        assert!(fs::symlink_metadata(&link).unwrap().is_file());
        assert!(!dir.join("nowhere").exists());
        fs::remove_dir_all(&dir).unwrap();
    }

    /// `--force` never replaces a device or a FIFO by a regular file.
    #[test]
    fn only_regular_files_are_replaced_even_with_replace() {
        let dir = scratch("special");
        let fifo = dir.join("pipe");
        let c = CString::new(fifo.as_os_str().as_bytes()).unwrap();
        assert_eq!(unsafe { libc::mkfifo(c.as_ptr(), 0o600) }, 0);
        let e = write_file(&fifo, b"x", Existing::Replace).unwrap_err();
        assert!(e.to_string().contains("not a regular file"), "{e}");
        assert!(!fs::symlink_metadata(&fifo).unwrap().is_file());
        let e = write_file(Path::new("/dev/null"), b"x", Existing::Replace).unwrap_err();
        assert!(e.to_string().contains("not a regular file"), "{e}");
        fs::remove_dir_all(&dir).unwrap();
    }

    /// A temporary file whose process is gone is named; one of a live process is not.
    #[test]
    fn leftovers_of_killed_runs_are_found() {
        let dir = scratch("leftovers");
        let target = dir.join("g.npz");
        // Process ids wrap below 2^22 on Linux; this one cannot be running.
        let dead = dir.join(".g.npz.plumb-tmp-2147483646-0");
        let live = dir.join(format!(".g.npz.plumb-tmp-{}-7", std::process::id()));
        let other = dir.join(".h.npz.plumb-tmp-2147483646-0");
        for p in [&dead, &live, &other] {
            fs::write(p, b"").unwrap();
        }
        assert_eq!(leftovers(&target), vec![dead]);
        fs::remove_dir_all(&dir).unwrap();
    }

    /// SIGTERM while a temporary file exists removes it: a forked copy of this process, with
    /// the file registered, signals itself.
    #[test]
    fn a_terminated_write_leaves_no_temporary_file() {
        let dir = scratch("signal");
        let temp = dir.join(".out.plumb-tmp-test");
        fs::write(&temp, b"partial").unwrap();
        let slot = cleanup::register(&temp);
        // SAFETY: the child only raises a signal (no allocation, no locks) and never returns.
        let pid = unsafe { libc::fork() };
        if pid == 0 {
            unsafe {
                libc::raise(libc::SIGTERM);
                libc::_exit(0)
            };
        }
        cleanup::release(slot);
        let mut status = 0;
        assert_eq!(unsafe { libc::waitpid(pid, &mut status, 0) }, pid);
        assert!(libc::WIFSIGNALED(status), "status {status}");
        assert_eq!(libc::WTERMSIG(status), libc::SIGTERM);
        assert!(!temp.exists(), "the temporary file was left behind");
        fs::remove_dir_all(&dir).unwrap();
    }
}
