//! The properties the fuzz targets (fuzz/, run with `cargo fuzz`) check on arbitrary input, in
//! the library so that the regression test (tests/cli/fuzzed.rs) replays every input the
//! fuzzer ever found against the very same checks. Each function panics when a property fails,
//! which is what the fuzzer reports; for any input they must return quietly.

use std::path::Path;

/// Spec text: parsing never panics; a refusal is a user error (exit 2) whose message names the
/// file; an accepted spec hashes, expands its grids, and parses again to the same hash.
pub fn spec_text(bytes: &[u8]) {
    let Ok(text) = std::str::from_utf8(bytes) else {
        // The loader refuses non-UTF-8 spec files before parsing (std's read_to_string).
        return;
    };
    let file = Path::new("fuzz.toml");
    let base = Path::new("fuzz-base");
    match crate::spec::parse(text, file, base) {
        Err(e) => {
            let msg = e.to_string();
            assert_eq!(e.exit_code(), 2, "a spec refusal is a user error: {msg}");
            assert!(
                msg.contains("fuzz.toml"),
                "the message names the file: {msg}"
            );
        }
        Ok(spec) => {
            let hash = spec.canonical_hash();
            let candidates: usize = spec.models.iter().map(|m| m.expand().len()).sum();
            assert!(candidates > 0, "an accepted spec has candidates");
            match crate::spec::parse(text, file, base) {
                Ok(again) => assert_eq!(again.canonical_hash(), hash, "parsing is a function"),
                Err(e) => panic!("the same text was accepted, then refused: {e}"),
            }
        }
    }
}

/// CSV bytes: both readers (the general one, and the fast one for plain files) never panic;
/// a refusal is a user error whose message names the file, the same from both readers; when
/// the fast reader takes the file its table equals the general reader's cell for cell,
/// whatever the block size and threads.
pub fn csv_bytes(bytes: &[u8], path: &Path) {
    if std::fs::write(path, bytes).is_err() {
        return;
    }
    let sha = crate::spec::hex(&<sha2::Sha256 as sha2::Digest>::digest(bytes));
    let general = crate::data::parse(bytes, path, sha.clone(), &[]);
    if let Err(e) = &general {
        let msg = e.to_string();
        assert_eq!(e.exit_code(), 2, "a CSV refusal is a user error: {msg}");
        assert!(
            msg.contains(&path.display().to_string()),
            "the message names the file: {msg}"
        );
    }
    for (threads, block) in [(1, 1 << 10), (3, 1 << 10), (2, 1 << 20)] {
        let fast = match crate::data::load_plain(path, &[], threads, block) {
            Ok(Some(t)) => t,
            // Not a plain file: the general reader's result stands.
            Ok(None) => continue,
            // A bad value: the general reader refuses it with the same message.
            Err(e) => {
                match &general {
                    Err(g) => assert_eq!(e.to_string(), g.to_string(), "the readers' messages"),
                    Ok(_) => panic!("the fast reader refused a file the general reader takes: {e}"),
                }
                continue;
            }
        };
        let general = match &general {
            Ok(g) => g,
            Err(e) => panic!("the fast reader took a file the general reader refuses: {e}"),
        };
        assert_eq!(fast.sha256, sha, "hash");
        assert_eq!(fast.lines, general.lines, "line numbers");
        assert_eq!(fast.columns.len(), general.columns.len(), "columns");
        for (f, g) in fast.columns.iter().zip(&general.columns) {
            assert_eq!(f.name, g.name);
            let same = match (&f.values, &g.values) {
                // Bitwise, so missing cells (NaN) compare equal.
                (crate::data::Values::Numeric(a), crate::data::Values::Numeric(b)) => a
                    .iter()
                    .map(|v| v.to_bits())
                    .eq(b.iter().map(|v| v.to_bits())),
                (a, b) => a == b,
            };
            assert!(same, "column {} differs between the readers", f.name);
        }
    }
}
