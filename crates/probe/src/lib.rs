//! The host side of plumb's wire protocol (docs/protocol.md): start a program, hand it parameters
//! and data, and ask it for its loss, its gradient, and its loss at batches of perturbations —
//! every request under a timeout, every reply checked, and every failure (a crash, a hang, garbage,
//! a wrong shape, a NaN) turned into an error that says which.
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

mod error;
mod program;

pub use error::ProbeError;
pub use program::{Change, Gradient, Hello, PROTOCOL, Program, TensorSpec, fuzz_replies};
