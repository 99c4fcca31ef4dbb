//! `plumb demo`, run once per test binary and shared. Each run trains three networks and takes
//! seconds; the tests of the demo, its JSON, its HTML report and the probe examples read the same
//! runs instead of starting their own. What they share is read only: a test that changes the
//! written files copies them first (`copy_written`).

use std::path::{Path, PathBuf};
use std::sync::OnceLock;

use super::{Run, command, plumb, run, scratch};

/// The demo at seed 0 with its files: its report on stdout and the directory it wrote.
pub struct Written {
    pub run: Run,
    pub dir: PathBuf,
}

/// `plumb demo --write DIR --format json` (seed 0), once. Its HTML report is DIR/pump-report.html.
pub fn written() -> &'static Written {
    static WRITTEN: OnceLock<Written> = OnceLock::new();
    WRITTEN.get_or_init(|| {
        let dir = scratch("demo-written");
        let run = plumb(&["demo", "--write", dir.to_str().unwrap(), "--format", "json"]);
        run.assert_code(0);
        Written { run, dir }
    })
}

/// A fresh directory holding a copy of the files `written()` wrote, for a test that changes them.
pub fn copy_written(name: &str) -> PathBuf {
    let copy = scratch(name);
    for entry in std::fs::read_dir(&written().dir).unwrap() {
        let from = entry.unwrap().path();
        std::fs::copy(&from, copy.join(from.file_name().unwrap())).unwrap();
    }
    copy
}

/// The seed run twice in a row, each with TMPDIR the same fresh directory (where a demo without
/// --write or --html leaves its HTML report, named by its seed).
pub struct Twice {
    pub first: Run,
    pub second: Run,
    pub tmp: PathBuf,
}

/// The seed `twice()` runs.
pub const TWICE_SEED: u64 = 3;

/// `plumb demo --format json --seed 3` twice in one TMPDIR, once per test binary.
pub fn twice() -> &'static Twice {
    static TWICE: OnceLock<Twice> = OnceLock::new();
    TWICE.get_or_init(|| {
        let tmp = scratch("demo-tmp");
        let first = in_tmp(&tmp, TWICE_SEED);
        let second = in_tmp(&tmp, TWICE_SEED);
        Twice { first, second, tmp }
    })
}

/// `plumb demo --format json --seed SEED` (its JSON report), once per seed; seed 0 is `written()`'s
/// run and seed 3 `twice()`'s first.
pub fn report(seed: u64) -> &'static Run {
    static OTHERS: [OnceLock<Run>; 2] = [OnceLock::new(), OnceLock::new()];
    match seed {
        0 => &written().run,
        TWICE_SEED => &twice().first,
        1 | 2 => OTHERS[seed as usize - 1]
            .get_or_init(|| in_tmp(&scratch(&format!("demo-seed{seed}")), seed)),
        _ => panic!("the shared demo runs are seeds 0 to 3"),
    }
}

fn in_tmp(tmp: &Path, seed: u64) -> Run {
    let mut c = command(
        tmp,
        &["demo", "--format", "json", "--seed", &seed.to_string()],
    );
    c.env("TMPDIR", tmp);
    run(c)
}
