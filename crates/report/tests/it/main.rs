//! One test binary for the whole directory: every file is a module, so the suite links
//! once instead of once per file (most of CI's time is building test binaries).

mod baseline;
mod corpus;
mod plots;
