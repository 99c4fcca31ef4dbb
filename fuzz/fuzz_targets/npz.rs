#![no_main]
//! The npz reader on arbitrary bytes: an error or tensors, never a panic, hang or huge allocation.
libfuzzer_sys::fuzz_target!(|bytes: &[u8]| {
    let _ = plumb_formats::fuzz::tensors("npz", bytes);
});
