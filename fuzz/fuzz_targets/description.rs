#![no_main]
//! The network description parser on arbitrary text.
libfuzzer_sys::fuzz_target!(|bytes: &[u8]| {
    let _ = plumb_formats::fuzz::description(bytes);
});
