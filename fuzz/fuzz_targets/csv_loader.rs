//! Fuzz target: arbitrary bytes as a CSV data file, read by both readers (properties in
//! probity::fuzzing::csv_bytes). The bytes go through a file because the fast reader reads
//! files in blocks.
#![no_main]

use std::path::PathBuf;
use std::sync::OnceLock;

fn path() -> &'static PathBuf {
    static PATH: OnceLock<PathBuf> = OnceLock::new();
    PATH.get_or_init(|| std::env::temp_dir().join(format!("probity-fuzz-{}.csv", std::process::id())))
}

libfuzzer_sys::fuzz_target!(|data: &[u8]| {
    probity::fuzzing::csv_bytes(data, path());
});
