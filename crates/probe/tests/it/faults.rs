//! Faults of an outside program, told apart by what they are.

use std::time::{Duration, Instant};

use std::path::{Path, PathBuf};

use plumb_probe::{ProbeError, Program, fuzz_replies};

/// A program that closes its stdin and keeps running is reported as such, not as one that "did
/// not answer" within the timeout.
#[test]
fn a_program_that_closes_its_stdin_is_reported_as_such() {
    let command: Vec<String> = ["sh", "-c", "exec 0<&-; sleep 30"]
        .iter()
        .map(|s| s.to_string())
        .collect();
    let start = Instant::now();
    let mut program = Program::start(&command, Duration::from_secs(2)).unwrap();
    let e = program.hello(None).unwrap_err();
    assert!(matches!(e, ProbeError::StdinClosed { .. }), "{e}");
    assert!(e.to_string().contains("closed its stdin"), "{e}");
    assert!(!e.to_string().contains("did not answer"), "{e}");
    // It was stopped, not waited for.
    assert!(start.elapsed() < Duration::from_secs(10));
}

fn protocol_corpus() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../../fuzz/corpus/protocol")
}

/// The protocol fuzz corpus (fuzz/corpus/protocol/, written by fuzz/protocol_seeds.py and grown
/// by cargo-fuzz runs) replayed through the target's entry point: never a panic, every
/// `hostile-*` seed refused, the well-formed replies accepted.
#[test]
fn every_protocol_corpus_file_is_read_without_panic() {
    let mut read = 0;
    for entry in std::fs::read_dir(protocol_corpus()).unwrap() {
        let path = entry.unwrap().path();
        let bytes = std::fs::read(&path).unwrap();
        let name = path.file_name().unwrap().to_string_lossy().to_string();
        let Ok(result) = std::panic::catch_unwind(|| fuzz_replies(&bytes)) else {
            panic!("{name} panicked");
        };
        if name.starts_with("hostile-") {
            assert!(result.is_err(), "{name} was accepted");
        }
        read += 1;
    }
    assert!(read >= 20, "{read} files");
}

/// What each hostile seed is refused for, and what the good ones are accepted as.
#[test]
fn hostile_replies_are_refused_naming_what_is_wrong() {
    for (file, says) in [
        ("hostile-garbage.bin", "Garbage(\"step 1 of 10"),
        ("hostile-nan.bin", "NonFinite"),
        ("hostile-cut-line.bin", "Cut("),
        (
            "hostile-wrong-type.bin",
            "a reply of type `ready`, expected `loss`",
        ),
        ("hostile-protocol-2.bin", "protocol version 2"),
        ("hostile-dtype.bin", "`dtype` must be"),
        ("hostile-no-tensors.bin", "no list `tensors`"),
        (
            "hostile-count-huge.bin",
            "more than the 134217728 plumb will take",
        ),
        (
            "hostile-count-over-limit.bin",
            "announces 3 float64 values, but the request calls for 2",
        ),
        ("hostile-losses-fewer.bin", "2 losses for 3 perturbations"),
        (
            "hostile-payload-cut.bin",
            "payload of 3 float64 values is cut short",
        ),
        (
            "hostile-gradient-infinite.bin",
            "not finite (inf) at [1, 0]",
        ),
        ("hostile-shape-overflow.bin", "too large to hold"),
        ("hostile-shape-negative.bin", "not a list of whole numbers"),
        ("hostile-loss-missing.bin", "no number `loss`"),
    ] {
        let bytes = std::fs::read(protocol_corpus().join(file)).unwrap();
        let e = fuzz_replies(&bytes).unwrap_err();
        assert!(e.contains(says), "{file}: `{says}` not in {e}");
    }
    for (file, replies) in [
        ("hello.bin", 1),
        ("hello-sample-shapes.bin", 1),
        ("ready.bin", 1),
        ("loss.bin", 1),
        ("gradient.bin", 1),
        ("losses.bin", 1),
        ("two-replies.bin", 2),
    ] {
        let bytes = std::fs::read(protocol_corpus().join(file)).unwrap();
        assert_eq!(fuzz_replies(&bytes), Ok(replies), "{file}");
    }
    let e = fuzz_replies(&std::fs::read(protocol_corpus().join("error-reply.bin")).unwrap());
    assert!(e.unwrap_err().contains("invented failure"));
}

/// A payload announced within the limit (200 values) but cut short (3 sent) is refused as such.
#[test]
fn an_announced_payload_is_refused_when_cut_short() {
    let mut bytes = vec![4, 255];
    bytes.extend_from_slice(b"{\"type\": \"losses\", \"count\": 200}\n");
    bytes.extend_from_slice(&[0u8; 24]);
    let e = fuzz_replies(&bytes).unwrap_err();
    assert!(
        e.contains("payload of 200 float64 values is cut short"),
        "{e}"
    );
}
