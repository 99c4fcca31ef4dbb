#![no_main]
//! A shard report (`plumb merge`) read back from arbitrary bytes.
libfuzzer_sys::fuzz_target!(|bytes: &[u8]| {
    let _ = plumb_fd::report::fuzz_shard(bytes);
});
