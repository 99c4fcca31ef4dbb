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

/// Why a probe run could not finish: the program failed the protocol, or an input (a weight or
/// data file, an option against what the program declared) cannot be used. Each says which.
/// (The causes are boxed: they are large, and a run fails once.)
#[derive(Debug, Error)]
pub enum RunError {
    #[error(transparent)]
    Program(Box<ProbeError>),
    #[error(transparent)]
    Check(Box<plumb_fd::CheckError>),
    #[error(transparent)]
    Compare(Box<plumb_diagnose::report::CompareError>),
    #[error(transparent)]
    Tensors(Box<plumb_formats::TensorFileError>),
    #[error(transparent)]
    Data(Box<plumb_formats::DataError>),
    #[error("{0}")]
    Input(String),
}

macro_rules! boxed_from {
    ($($variant:ident: $cause:ty),*) => {$(
        impl From<$cause> for RunError {
            fn from(e: $cause) -> RunError {
                RunError::$variant(Box::new(e))
            }
        }
    )*};
}

boxed_from!(
    Program: ProbeError,
    Check: plumb_fd::CheckError,
    Compare: plumb_diagnose::report::CompareError,
    Tensors: plumb_formats::TensorFileError,
    Data: plumb_formats::DataError
);
