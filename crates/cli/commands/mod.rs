//! One module per command: validate its flags, call the libraries, build its report.

pub mod grad;
pub mod shapes;
