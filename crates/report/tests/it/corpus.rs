//! The baseline fuzz corpus (fuzz/corpus/baseline/) through the target's entry point: a baseline
//! or an error, never a panic; and a baseline without its network cannot judge a run on one.

use std::path::Path;

use plumb_report::{Baseline, Document, NetworkId};

#[test]
fn every_baseline_corpus_file_is_read_without_panic() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("../../fuzz/corpus/baseline");
    let mut read = 0;
    for entry in std::fs::read_dir(&dir).unwrap() {
        let path = entry.unwrap().path();
        let bytes = std::fs::read(&path).unwrap();
        let result = std::panic::catch_unwind(|| Baseline::from_json(&bytes).is_ok());
        assert!(result.is_ok(), "{} panicked", path.display());
        read += 1;
    }
    assert!(read >= 3);
    let null = std::fs::read(dir.join("network-null.json")).unwrap();
    let base = Baseline::from_json(&null).unwrap();
    let mut doc = Document::new("shapes");
    doc.network = Some(NetworkId {
        hash: "0".into(),
        shapes: vec![("layer1".into(), vec![5, 5])],
    });
    assert!(base.unfit_for(&doc).is_some());
}
