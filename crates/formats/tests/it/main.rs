//! One test binary for the whole directory: every file is a module, so the suite links
//! once instead of once per file (most of CI's time is building test binaries).

mod budget;
mod corpus;
mod file_tensors;
mod graph_data;
mod graph_description;
mod malformed;
mod numpy_files;
mod roundtrip;
