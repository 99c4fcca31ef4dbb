//! `plumb probe` as a library: the host side of plumb's wire protocol (docs/protocol.md) — start a
//! program, hand it parameters and data, and ask it for its loss, its gradient (and input
//! gradient), and its loss at batches of perturbations, every request under a timeout, every reply
//! checked, and every failure (a crash, a hang, garbage, a wrong shape, a NaN) turned into an
//! error that says which — and the probe run on top of it ([`probe`]): the program's gradient
//! against its own loss, its loss and gradient against the reference of a description of any
//! kind, with the diagnosis, as a [`ProbeReport`] the command line only renders.
//!
//! ```no_run
//! use std::time::Duration;
//! use plumb_probe::{Program, TensorSpec};
//!
//! let cmd = vec!["python3".to_string(), "examples/python/pump_numpy.py".to_string()];
//! let mut p = Program::start(&cmd, Duration::from_secs(60))?;
//! let hello = p.hello(Some(&[TensorSpec { name: "layer1".into(), shape: vec![8, 5] }]))?;
//! # Ok::<(), plumb_probe::ProbeError>(())
//! ```

/// An input error (`RunError::Input`) with a formatted message, returned.
macro_rules! bail {
    ($($t:tt)*) => {
        return Err($crate::RunError::Input(format!($($t)*)))
    };
}

mod blackbox;
mod error;
mod graph_inside;
mod program;
mod report;
mod self_check;
mod session;

pub use error::{ProbeError, RunError};
pub use program::{Change, Gradient, Hello, PROTOCOL, Program, TensorSpec, fuzz_replies};
pub use report::{ProbeReport, ProgramReport, SelfCheck, SelfTensor, SelfWorst};
pub use session::{BatchFor, ProbeOptions, Source, blackbox_data, probe};
