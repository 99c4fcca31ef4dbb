//! One test binary for the whole directory: every file is a module, so the suite links
//! once instead of once per file (most of CI's time is building test binaries).

mod graph_common;

mod accuracy;
mod budget;
mod conventions;
mod external;
mod graph_along;
mod graph_difference;
mod graph_engine;
mod graph_fast;
mod graph_kinks;
mod graph_mistakes;
mod graph_pass;
mod graph_places;
mod graph_scales;
mod graph_seeds;
mod graph_shards;
mod graph_units;
mod one_step;
mod settle;
mod shard_corpus;
mod sweep_report;
mod verdicts;
