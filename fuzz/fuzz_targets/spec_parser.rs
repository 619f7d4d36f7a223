//! Fuzz target: arbitrary bytes as a spec file (properties in probity::fuzzing::spec_text).
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| {
    probity::fuzzing::spec_text(data);
});
