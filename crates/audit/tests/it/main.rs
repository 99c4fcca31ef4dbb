//! One test binary for the whole directory: every file is a module, so the suite links
//! once instead of once per file (most of CI's time is building test binaries).

mod graph_common;

mod graph_health;
mod graph_init;
mod graph_sequence_health;
mod graph_shapes;
mod hostile;
mod init;
mod iris;
