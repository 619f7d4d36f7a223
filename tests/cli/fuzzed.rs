//! Every input the fuzzers were seeded with or ever found a failure on (fuzz/seeds/,
//! fuzz/regressions/), checked against the fuzz targets' own properties (probity::fuzzing), so
//! a fixed crash stays fixed without running the fuzzer.

use std::path::{Path, PathBuf};

fn inputs(target: &str) -> Vec<PathBuf> {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("fuzz");
    let mut out = Vec::new();
    for dir in ["seeds", "regressions"] {
        let Ok(entries) = std::fs::read_dir(root.join(dir).join(target)) else {
            continue;
        };
        // (Dot files keep empty folders in git.)
        out.extend(
            entries.map(|e| e.unwrap().path()).filter(|p| {
                p.is_file() && !p.file_name().unwrap().to_string_lossy().starts_with('.')
            }),
        );
    }
    out.sort();
    out
}

#[test]
fn spec_parser_inputs_keep_their_properties() {
    let files = inputs("spec_parser");
    assert!(files.len() >= 5, "the seed corpus is missing: {files:?}");
    let mut accepted = 0;
    for f in &files {
        let bytes = std::fs::read(f).unwrap();
        probity::fuzzing::spec_text(&bytes);
        let text = String::from_utf8_lossy(&bytes);
        accepted +=
            usize::from(probity::spec::parse(&text, Path::new("s.toml"), Path::new(".")).is_ok());
    }
    // The seeds are real specs: the fuzzer starts from accepted inputs, not from noise.
    assert!(accepted >= 5, "{accepted} of {} accepted", files.len());
}

#[test]
fn csv_loader_inputs_keep_their_properties() {
    let files = inputs("csv_loader");
    assert!(files.len() >= 5, "the seed corpus is missing: {files:?}");
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("fuzzed.csv");
    for f in &files {
        probity::fuzzing::csv_bytes(&std::fs::read(f).unwrap(), &path);
    }
}
