//! One test binary for the whole directory: every file is a module, so the suite links
//! once instead of once per file (most of CI's time is building test binaries).

mod util;

mod audit;
mod check;
mod clients;
mod compare;
mod demo;
mod grad;
mod graph;
mod graph_audit;
mod graph_check;
mod graph_compare;
mod graph_shards;
mod hostile;
mod hostile_readers;
mod json;
mod malformed;
mod probe;
mod regression;
mod report;
mod shapes;
