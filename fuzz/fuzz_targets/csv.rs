#![no_main]
//! The CSV data reader on arbitrary bytes (the first two choose the network's inputs and outputs).
libfuzzer_sys::fuzz_target!(|bytes: &[u8]| {
    let _ = plumb_formats::fuzz::data("csv", bytes);
});
