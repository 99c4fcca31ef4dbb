#![no_main]
//! A baseline (`--baseline`) read back from arbitrary bytes.
libfuzzer_sys::fuzz_target!(|bytes: &[u8]| {
    let _ = plumb_report::Baseline::from_json(bytes);
});
