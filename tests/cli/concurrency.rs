//! Several processes on one ledger at once: each waits for the write lock (the busy timeout)
//! instead of failing, a new ledger is migrated once, and the chain stays intact.

use crate::fixtures::small_dir;
use std::process::{Child, Command, Stdio};

fn start(dir: &std::path::Path, args: &[&str]) -> Child {
    Command::new(assert_cmd::cargo::cargo_bin("probity"))
        .current_dir(dir)
        .args(args)
        .env_remove("PROBITY_LEDGER")
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap()
}

fn all_succeed(children: Vec<Child>) {
    for c in children {
        let out = c.wait_with_output().unwrap();
        assert!(
            out.status.success(),
            "exit {:?}: {}",
            out.status.code(),
            String::from_utf8_lossy(&out.stderr)
        );
    }
}

#[test]
fn runs_and_a_reveal_at_once_all_succeed_with_an_intact_chain() {
    let d = small_dir("concurrent");
    // Three first runs at once in a folder with no ledger: one creates and migrates it, the
    // others wait and use it.
    all_succeed(
        (0..3)
            .map(|_| start(&d.path, &["run", "small.toml"]))
            .collect(),
    );
    // Two more runs and a reveal at once on the ledger they made.
    all_succeed(vec![
        start(&d.path, &["run", "small.toml"]),
        start(&d.path, &["reveal", "1", "--yes"]),
        start(&d.path, &["run", "small.toml"]),
    ]);
    let counts: std::collections::BTreeMap<String, i64> = d.counts().into_iter().collect();
    assert_eq!(counts["runs"], 5);
    assert_eq!(counts["reveals"], 1);
    // The partition's seal, five runs and a reveal.
    assert_eq!(counts["chain"], 7);
    // One partition: the five runs share the split.
    assert_eq!(counts["partitions"], 1);
    let r = d.probity(&["audit", "--verify"]).expect(0);
    assert!(r.stdout().contains("intact"), "{}", r.stdout());
}
