//! Everything that can go wrong with an outside program, in words that say what happened.

use thiserror::Error;

#[derive(Debug, Error)]
pub enum ProbeError {
    #[error("cannot start `{command}`: {reason}; check the command after `--`")]
    Spawn { command: String, reason: String },
    #[error("the program {status} {when}{}", tail(.stderr))]
    Exited {
        status: String,
        when: String,
        stderr: Vec<String>,
    },
    #[error("the program did not answer the {request} request within {seconds} s, so plumb stopped it; raise --timeout if it is only slow{}", tail(.stderr))]
    Timeout {
        request: String,
        seconds: u64,
        stderr: Vec<String>,
    },
    #[error(
        "the program wrote something that is not a protocol message in reply to {request}: `{text}` — its stdout must carry only protocol messages; print anything else to stderr"
    )]
    Garbage { request: String, text: String },
    #[error("the program's reply to {request} is malformed: {what}")]
    Malformed { request: String, what: String },
    #[error("the program speaks protocol version {theirs}; this plumb speaks version {ours}")]
    Version { theirs: String, ours: u32 },
    #[error("the program reported an error in reply to {request}: {message}")]
    Remote { request: String, message: String },
    #[error("{0}")]
    Mismatch(String),
    #[error("the program's {what} is not finite ({value}) {place}")]
    NonFinite {
        what: String,
        value: f64,
        place: String,
    },
    #[error("the program closed its stdin before reading the {request} request, and kept running, so plumb stopped it; it must read requests from stdin until plumb closes it{}", tail(.stderr))]
    StdinClosed {
        request: String,
        stderr: Vec<String>,
    },
    #[error("cannot send the {request} request: {reason}{}", tail(.stderr))]
    Send {
        request: String,
        reason: String,
        stderr: Vec<String>,
    },
}

fn tail(lines: &[String]) -> String {
    if lines.is_empty() {
        String::new()
    } else {
        format!("; its last words on stderr:\n    {}", lines.join("\n    "))
    }
}
