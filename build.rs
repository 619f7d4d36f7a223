//! Records the tool's git commit and target triple at build time, so every run can say exactly
//! which build produced it (replay explains differences with them).

use std::process::Command;

fn git(args: &[&str]) -> Option<String> {
    let out = Command::new("git").args(args).output().ok()?;
    out.status
        .success()
        .then(|| String::from_utf8_lossy(&out.stdout).trim().to_string())
}

fn main() {
    let commit = match git(&["rev-parse", "HEAD"]) {
        Some(c) if !c.is_empty() => {
            let modified = git(&["status", "--porcelain", "--untracked-files=no"])
                .is_some_and(|s| !s.is_empty());
            if modified { format!("{c}-modified") } else { c }
        }
        _ => "unknown".to_string(),
    };
    println!("cargo:rustc-env=PROBITY_GIT_COMMIT={commit}");
    println!(
        "cargo:rustc-env=PROBITY_TARGET={}",
        std::env::var("TARGET").unwrap_or_else(|_| "unknown".into())
    );
    for p in [".git/HEAD", ".git/index"] {
        if std::path::Path::new(p).exists() {
            println!("cargo:rerun-if-changed={p}");
        }
    }
    println!("cargo:rerun-if-changed=build.rs");
}
