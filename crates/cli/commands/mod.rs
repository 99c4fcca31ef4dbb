//! One module per command: validate its flags, call the libraries, build its report.

pub mod audit;
pub mod check;
pub mod compare;
pub mod grad;
pub mod merge;
pub mod probe;
pub mod shapes;
pub mod sweep;
