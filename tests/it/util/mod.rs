//! Running the built `plumb` binary on the files under fixtures/.

#![allow(dead_code)]

use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::sync::atomic::{AtomicUsize, Ordering};

pub mod demo;

/// The repository's fixtures directory.
pub fn fixture(rel: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fixtures")
        .join(rel)
}

/// A fresh empty directory under the target directory, unique per call.
pub fn scratch(name: &str) -> PathBuf {
    static N: AtomicUsize = AtomicUsize::new(0);
    let dir = Path::new(env!("CARGO_TARGET_TMPDIR")).join(format!(
        "{name}-{}-{}",
        std::process::id(),
        N.fetch_add(1, Ordering::SeqCst)
    ));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

/// The outcome of one run.
pub struct Run {
    pub code: i32,
    pub stdout: String,
    pub stderr: String,
}

impl Run {
    pub fn assert_code(&self, code: i32) -> &Self {
        assert_eq!(
            self.code, code,
            "exit code {} (wanted {code})\n--- stdout\n{}\n--- stderr\n{}",
            self.code, self.stdout, self.stderr
        );
        self
    }

    pub fn json(&self) -> serde_json::Value {
        serde_json::from_str(&self.stdout)
            .unwrap_or_else(|e| panic!("stdout is not JSON ({e}):\n{}", self.stdout))
    }
}

/// A JSON value written to `dir/name`; its path as text, for a command line.
pub fn write(dir: &Path, name: &str, v: &serde_json::Value) -> String {
    let p = dir.join(name);
    std::fs::write(&p, v.to_string()).unwrap();
    p.to_str().unwrap().to_string()
}

/// `plumb merge` of these shard files, JSON on stdout.
pub fn merge(files: &[&str]) -> Run {
    let mut args = vec!["merge", "--format", "json", "--quiet"];
    args.extend(files);
    plumb(&args)
}

/// An input refused: exit 2, no panic, and each of `says` in stderr.
pub fn refused(run: &Run, says: &[&str]) {
    run.assert_code(2);
    assert!(!run.stderr.contains("panicked"), "{}", run.stderr);
    for s in says {
        assert!(run.stderr.contains(s), "`{s}` not in: {}", run.stderr);
    }
}

/// The findings of a JSON report.
pub fn findings(report: &serde_json::Value) -> &[serde_json::Value] {
    report["findings"]
        .as_array()
        .unwrap_or_else(|| panic!("no findings in {report:#}"))
}

/// Runs plumb with the arguments, colour off and NO_COLOR set, in the given directory.
pub fn plumb_in(dir: &Path, args: &[&str]) -> Run {
    run(command(dir, args))
}

/// Runs plumb from the fixtures directory, so relative fixture paths work.
pub fn plumb(args: &[&str]) -> Run {
    plumb_in(&fixture(""), args)
}

/// The built plumb with the arguments, colour off and NO_COLOR set, in the given directory.
pub fn command(dir: &Path, args: &[&str]) -> Command {
    let mut c = Command::new(env!("CARGO_BIN_EXE_plumb"));
    c.args(args).current_dir(dir).env("NO_COLOR", "1");
    c
}

/// Runs the command to its end and keeps what it printed.
pub fn run(mut c: Command) -> Run {
    let out: Output = c.output().expect("run plumb");
    Run {
        code: out.status.code().unwrap_or(-1),
        stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
    }
}
