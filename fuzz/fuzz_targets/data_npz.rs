#![no_main]
//! The NPZ data reader (x and y) on arbitrary bytes (the first two choose inputs and outputs).
libfuzzer_sys::fuzz_target!(|bytes: &[u8]| {
    let _ = plumb_formats::fuzz::data("npz", bytes);
});
