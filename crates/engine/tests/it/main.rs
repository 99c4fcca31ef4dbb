//! One test binary for the whole directory: every file is a module, so the suite links
//! once instead of once per file (most of CI's time is building test binaries).

mod common;
mod graph_common;

mod dual;
mod graph_bends;
mod graph_difference;
mod graph_dual;
mod graph_f32_batch;
mod graph_fixtures;
mod graph_init;
mod graph_mistakes;
mod graph_published;
mod graph_response;
mod graph_sequence;
mod graph_sequence_fixtures;
mod graph_sequence_published;
mod graph_tail_kinks;
mod graph_tails;
mod graph_units;
mod iris;
mod published;
