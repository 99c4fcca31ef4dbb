//! Every file of the fuzz corpora (fuzz/corpus/<target>/) through the fuzz targets' entry points,
//! so CI replays them on stable: no panic, and no input read for long. `mutate_corpora` (ignored;
//! run by hand) is a seeded mutation loop on stable, see fuzz/README.md.

use std::path::{Path, PathBuf};

use plumb_formats::fuzz;

fn corpus(target: &str) -> Vec<PathBuf> {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../../fuzz/corpus")
        .join(target);
    let mut files: Vec<PathBuf> = std::fs::read_dir(&dir)
        .unwrap_or_else(|e| panic!("{}: {e}", dir.display()))
        .map(|e| e.unwrap().path())
        .collect();
    files.sort();
    assert!(!files.is_empty(), "{}: an empty corpus", dir.display());
    files
}

/// The entry point of each target of this crate.
fn run(target: &str, bytes: &[u8]) -> Result<usize, String> {
    match target {
        "description" => fuzz::description(bytes),
        "npy" | "npz" | "safetensors" => fuzz::tensors(target, bytes),
        "csv" => fuzz::data("csv", bytes),
        "data_npz" => fuzz::data("npz", bytes),
        other => unreachable!("{other}"),
    }
}

const TARGETS: [&str; 6] = [
    "description",
    "npy",
    "npz",
    "safetensors",
    "csv",
    "data_npz",
];

#[test]
fn every_corpus_file_is_read_without_panic() {
    for target in TARGETS {
        for file in corpus(target) {
            let bytes = std::fs::read(&file).unwrap();
            // Ok or a message; a panic fails the test and names no file, so say it first.
            let result = std::panic::catch_unwind(|| run(target, &bytes));
            assert!(result.is_ok(), "{target}: {} panicked", file.display());
        }
    }
}

/// The hostile seeds are refused, not accepted.
#[test]
fn the_hostile_seeds_are_refused() {
    for target in TARGETS {
        for file in corpus(target) {
            if file
                .file_name()
                .unwrap()
                .to_string_lossy()
                .starts_with("hostile-")
            {
                let bytes = std::fs::read(&file).unwrap();
                assert!(run(target, &bytes).is_err(), "{}", file.display());
            }
        }
    }
}

/// A seeded mutation loop over the corpora (bit flips, byte sets, cuts, splices and repeats),
/// for running by hand on stable: `PLUMB_MUTATIONS=100000 cargo test -p plumb-formats --test
/// corpus -- --ignored --nocapture`. Prints executions per target; a panic names the input,
/// written under target/fuzz-crash-*.
#[test]
#[ignore]
fn mutate_corpora() {
    let per_target: u64 = std::env::var("PLUMB_MUTATIONS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(10_000);
    let mut state = 0x9e37_79b9_7f4a_7c15u64;
    let mut next = move || {
        // xorshift64*: enough for choosing mutations.
        state ^= state >> 12;
        state ^= state << 25;
        state ^= state >> 27;
        state.wrapping_mul(0x2545_f491_4f6c_dd1d)
    };
    let hook = std::panic::take_hook();
    std::panic::set_hook(Box::new(|_| {}));
    for target in TARGETS {
        let seeds: Vec<Vec<u8>> = corpus(target)
            .iter()
            .map(|f| std::fs::read(f).unwrap())
            .collect();
        let (mut accepted, mut refused) = (0u64, 0u64);
        let start = std::time::Instant::now();
        for _ in 0..per_target {
            let mut b = seeds[next() as usize % seeds.len()].clone();
            for _ in 0..1 + next() % 4 {
                let at = |n: u64, len: usize| if len == 0 { 0 } else { n as usize % len };
                match next() % 6 {
                    0 if !b.is_empty() => {
                        let i = at(next(), b.len());
                        b[i] ^= 1 << (next() % 8);
                    }
                    1 if !b.is_empty() => {
                        let i = at(next(), b.len());
                        b[i] = [0, 0xff, b'"', b',', b'\n', b'(', b'9', 0x7f][next() as usize % 8];
                    }
                    2 => {
                        let i = at(next(), b.len() + 1);
                        b.truncate(i);
                    }
                    3 => {
                        let other = &seeds[next() as usize % seeds.len()];
                        let (i, j) = (at(next(), b.len() + 1), at(next(), other.len() + 1));
                        b.splice(i..i, other[j..].iter().take(64).copied());
                    }
                    4 if !b.is_empty() => {
                        let i = at(next(), b.len());
                        let piece: Vec<u8> = b[i..].iter().take(16).copied().collect();
                        for _ in 0..next() % 64 {
                            b.splice(i..i, piece.iter().copied());
                        }
                    }
                    _ => {
                        let i = at(next(), b.len() + 1);
                        let n = next().to_le_bytes();
                        b.splice(i..i, n);
                    }
                }
            }
            match std::panic::catch_unwind(|| run(target, &b)) {
                Ok(Ok(_)) => accepted += 1,
                Ok(Err(_)) => refused += 1,
                Err(_) => {
                    let out = Path::new(env!("CARGO_TARGET_TMPDIR"))
                        .join(format!("fuzz-crash-{target}-{}", next()));
                    std::fs::write(&out, &b).unwrap();
                    std::panic::set_hook(hook);
                    panic!("{target}: a panic on {}", out.display());
                }
            }
        }
        println!(
            "{target}: {} executions ({accepted} accepted, {refused} refused) in {:.1} s, no panic",
            accepted + refused,
            start.elapsed().as_secs_f64()
        );
    }
    std::panic::set_hook(hook);
}
