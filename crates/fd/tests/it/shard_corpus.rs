//! The shard fuzz corpus (fuzz/corpus/shard/) through the target's entry point
//! (`plumb_fd::report::fuzz_shard`): a shard or an error, never a panic; the `hostile-*` seeds are
//! refused with the item at fault named, and a whole split of one merges back into its own report.

use std::path::{Path, PathBuf};

use plumb_fd::report::{GraphPlace, Shards, fuzz_shard};
use plumb_formats::GraphDescription;

fn corpus() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../../fuzz/corpus/shard")
}

#[test]
fn every_shard_corpus_file_is_read_without_panic() {
    let mut read = 0;
    for entry in std::fs::read_dir(corpus()).unwrap() {
        let path = entry.unwrap().path();
        let bytes = std::fs::read(&path).unwrap();
        let name = path.file_name().unwrap().to_string_lossy().to_string();
        let result = std::panic::catch_unwind(|| fuzz_shard(&bytes));
        let Ok(result) = result else {
            panic!("{name} panicked");
        };
        if name.starts_with("hostile-") {
            assert!(result.is_err(), "{name} was accepted");
        }
        read += 1;
    }
    assert!(read >= 10);
}

#[test]
fn hostile_shards_are_refused_naming_what_is_wrong() {
    for (file, says) in [
        ("hostile-schema-999.json", "`schema_version` is 999"),
        // A dense check's shard of schema version 1 (index arrays, augmented row and column).
        (
            "hostile-schema-1-dense.json",
            "`schema_version` is 1, and this plumb reads 2",
        ),
        ("hostile-schema-string.json", "`schema_version` is \"1\""),
        (
            "hostile-status-unknown.json",
            "coordinate 1: an unknown status `fine`",
        ),
        (
            "hostile-rel-error-missing.json",
            "coordinate 2: missing field `rel_error`",
        ),
        ("hostile-shard-huge.json", "not [K, N]"),
        (
            "hostile-layer-string.json",
            "coordinate 1: invalid type: string \"1\"",
        ),
        ("hostile-cut.json", "not a JSON report"),
    ] {
        let bytes = std::fs::read(corpus().join(file)).unwrap();
        let e = fuzz_shard(&bytes).unwrap_err();
        assert!(e.contains(says), "{file}: `{says}` not in {e}");
        assert!(
            e.starts_with("fuzz.json"),
            "{file}: the file is not named: {e}"
        );
    }
    // Shard 1 of 2 alone: the other share is missing.
    let half = std::fs::read(corpus().join("small-1of2.json")).unwrap();
    let e = fuzz_shard(&half).unwrap_err();
    assert!(e.contains("2/2 missing"), "{e}");
}

/// A split of one is the whole run: merging it gives back the shard's own figures and verdicts
/// (null relative errors read back as NaN and ranked as they were).
#[test]
fn a_split_of_one_merges_into_its_own_report() {
    let bytes = std::fs::read(corpus().join("small-1of1.json")).unwrap();
    let shard: serde_json::Value = serde_json::from_slice(&bytes).unwrap();
    let shards = Shards::<GraphPlace>::parse(&[(PathBuf::from("small-1of1.json"), bytes)]).unwrap();
    // A dense description: its identity is its dense hash, as its check wrote it.
    let path = Path::new("../..").join(shards.description());
    let desc = GraphDescription::read(&path).unwrap();
    let merged = shards.merge_graph(&desc, 5).unwrap();
    let merged = serde_json::to_value(&merged).unwrap();
    for key in [
        "verdict",
        "tensors",
        "coordinates",
        "directions",
        "findings",
        "floors",
    ] {
        assert_eq!(merged[key], shard[key], "{key}");
    }
    assert!(merged["shard"].is_null());
}
