#![no_main]
//! The protocol reader (`plumb probe`) on arbitrary bytes from a program's stdout: framing and the
//! checks of the reply to the request the first byte picks (see `plumb_probe::fuzz_replies`).
libfuzzer_sys::fuzz_target!(|bytes: &[u8]| {
    let _ = plumb_probe::fuzz_replies(bytes);
});
