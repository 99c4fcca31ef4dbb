//! Faults of an outside program, told apart by what they are.

use std::time::{Duration, Instant};

use plumb_probe::{ProbeError, Program};

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
