//! Tidy checks that keep the architecture's invariants true without review.

use std::path::{Path, PathBuf};

fn rust_files(dir: &Path, out: &mut Vec<PathBuf>) {
    for e in std::fs::read_dir(dir).unwrap() {
        let p = e.unwrap().path();
        if p.is_dir() {
            rust_files(&p, out);
        } else if p.extension().is_some_and(|x| x == "rs") {
            out.push(p);
        }
    }
}

fn sources() -> Vec<(String, String)> {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let mut files = Vec::new();
    rust_files(&root.join("src"), &mut files);
    files.sort();
    files
        .into_iter()
        .map(|p| {
            (
                p.strip_prefix(root).unwrap().display().to_string(),
                std::fs::read_to_string(&p).unwrap(),
            )
        })
        .collect()
}

#[test]
fn every_source_file_opens_with_a_module_doc() {
    for (path, text) in sources() {
        assert!(
            text.starts_with("//!"),
            "{path} must start with a //! module doc"
        );
    }
}

#[test]
fn invariants_hold_as_absences() {
    for (path, text) in sources() {
        let code: String = text
            .lines()
            .filter(|l| !l.trim_start().starts_with("//"))
            .collect::<Vec<_>>()
            .join("\n");
        if !path.starts_with("src/ledger/") && !path.starts_with("src/error.rs") {
            assert!(
                !code.contains("rusqlite"),
                "{path}: only ledger/ speaks SQL"
            );
        }
        if !path.starts_with("src/cli/") && path != "src/main.rs" {
            for f in [
                "println!",
                "eprintln!",
                "eprint!(",
                "print!(",
                "io::stderr",
                "io::stdout",
                "Utc::now",
                "std::env::var",
                "env::var(",
            ] {
                // The command's box reads PATH and HOME to decide what the command may read
                // (never what a run computes).
                if path == "src/external/sandbox.rs" && f == "std::env::var" {
                    continue;
                }
                assert!(!code.contains(f), "{path}: {f} belongs in cli/ only");
            }
        }
        for f in [
            "thread_rng",
            "StdRng",
            "HashMap",
            "HashSet",
            "SystemTime",
            "rand::random",
        ] {
            assert!(
                !code.contains(f),
                "{path}: {f} may not be used (determinism)"
            );
        }
        assert!(
            !code.contains("#[should_panic]") && !code.contains("#[ignore]"),
            "{path}"
        );
    }
}

#[test]
fn models_do_no_io() {
    for (path, text) in sources()
        .into_iter()
        .filter(|(p, _)| p.starts_with("src/models/"))
    {
        for f in ["std::fs", "File::", "std::io"] {
            assert!(!text.contains(f), "{path}: models do no I/O ({f})");
        }
    }
}
