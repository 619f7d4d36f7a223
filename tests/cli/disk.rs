//! A ledger on a read-only or full disk. Both are real: each case runs the binary in a private
//! mount namespace (`unshare -rm`, Linux), on a read-only bind mount or on a tmpfs too small
//! for the next run; root in an ordinary test cannot be refused a write otherwise. Recording
//! commands must refuse with exit 2 and say why, store nothing, and leave the ledger intact;
//! reading commands must still work on a read-only ledger.
//!
//! Where namespaces are unavailable, `.ci/run` sets PROBITY_TEST_NO_NAMESPACES=1 and says so;
//! these tests then return early. Anywhere else they must run.

use crate::fixtures::small_dir;
use std::process::{Command, Output};

fn skipped() -> bool {
    if std::env::var_os("PROBITY_TEST_NO_NAMESPACES").is_some() {
        eprintln!("disk tests skipped: PROBITY_TEST_NO_NAMESPACES is set");
        return true;
    }
    false
}

/// Run `script` (sh) in a private user and mount namespace, with $P the binary.
fn in_namespace(dir: &std::path::Path, script: &str) -> Output {
    Command::new("unshare")
        .args(["-rm", "sh", "-c", script])
        .current_dir(dir)
        .env("P", assert_cmd::cargo::cargo_bin("probity"))
        .env_remove("PROBITY_LEDGER")
        .output()
        .expect("unshare (util-linux) is needed; set PROBITY_TEST_NO_NAMESPACES=1 to skip")
}

/// The exit code of each command of the script, printed as `rc=N` lines, and its stderr.
fn codes(out: &Output) -> (Vec<i32>, String) {
    let stdout = String::from_utf8_lossy(&out.stdout);
    let codes = stdout
        .lines()
        .filter_map(|l| l.strip_prefix("rc="))
        .map(|v| v.parse().unwrap())
        .collect();
    (codes, String::from_utf8_lossy(&out.stderr).into_owned())
}

#[test]
fn a_read_only_ledger_refuses_records_and_still_answers_reads() {
    if skipped() {
        return;
    }
    let d = small_dir("readonly");
    d.probity(&["run", "small.toml"]).expect(0);
    let before = d.counts();
    let out = in_namespace(
        &d.path,
        r#"set -u
mount --bind .probity .probity && mount -o remount,bind,ro .probity || { echo "mount failed" >&2; exit 90; }
touch .probity/probe 2>/dev/null && { echo "the bind mount is writable" >&2; exit 91; }
for cmd in "run small.toml" "reveal 1 --yes" "note 1 hello" "replay 1"; do
  $P $cmd >/dev/null; echo rc=$?
done
for cmd in "history" "show 1" "audit --verify" "export runs --format csv" "report 1 --out r.html"; do
  $P $cmd >/dev/null; echo rc=$?
done
"#,
    );
    assert_eq!(out.status.code(), Some(0), "{out:?}");
    let (codes, err) = codes(&out);
    assert_eq!(codes, vec![2, 2, 2, 2, 0, 0, 0, 0, 0], "{err}");
    let refusals: Vec<&str> = err.lines().collect();
    assert_eq!(refusals.len(), 4, "one line per refused command: {err}");
    for line in refusals {
        assert!(
            line.contains("is read-only") && line.contains("nothing was recorded"),
            "{line}"
        );
    }
    assert_eq!(d.counts(), before, "nothing was stored");
    d.probity(&["audit", "--verify"]).expect(0);
}

#[test]
fn a_full_disk_refuses_the_run_and_keeps_the_ledger_whole() {
    if skipped() {
        return;
    }
    let d = small_dir("diskfull");
    d.probity(&["run", "small.toml"]).expect(0);
    let before = d.counts();
    let size = std::fs::metadata(d.ledger()).unwrap().len();
    // Room for the ledger and the inputs, not for a second run's log.
    let room = (size + 60 * 1024) / 1024;
    let out = in_namespace(
        &d.path,
        &format!(
            r#"set -u
mkdir -p full && mount -t tmpfs -o size={room}k tmpfs full || {{ echo "mount failed" >&2; exit 90; }}
cp -r .probity small.toml small.csv full/ && cd full
$P run small.toml >/dev/null; echo rc=$?
$P history --json > ../history.json; echo rc=$?
$P audit --verify >/dev/null; echo rc=$?
cp .probity/ledger.sqlite ../after.sqlite
"#
        ),
    );
    assert_eq!(out.status.code(), Some(0), "{out:?}");
    let (codes, err) = codes(&out);
    assert_eq!(codes, vec![2, 0, 0], "{err}");
    assert!(
        err.trim_end().lines().count() == 1 && err.contains("the disk is full"),
        "one message, naming the cause: {err}"
    );
    // The ledger that filled the disk holds what it held before, and no start of the run.
    let history: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(d.path.join("history.json")).unwrap())
            .unwrap();
    assert_eq!(history["runs"].as_array().unwrap().len(), 1);
    assert_eq!(history["unfinished"], serde_json::json!([]));
    let after = probity::ledger::Ledger::open(&d.path.join("after.sqlite"), false).unwrap();
    assert_eq!(
        after.counts().unwrap().into_iter().collect::<Vec<_>>(),
        before
    );
}

#[test]
fn a_read_only_ledger_from_an_older_probity_is_refused_with_the_way_out() {
    if skipped() {
        return;
    }
    let d = small_dir("readonly-old");
    // A run as that release stored it: its partition's rows identified by version 2.
    crate::fixtures::library_run(&d, "small.toml", &d.ledger(), probity::data::Identity::V2);
    // Schema 5: before run starts and development uses were recorded, with partition_rows'
    // second index.
    let c = rusqlite::Connection::open(d.ledger()).unwrap();
    c.execute_batch(
        "DROP TABLE pending_seals; DROP TABLE seals; DROP TABLE run_starts; DROP TABLE uses; DROP TABLE partition_identities; DROP TABLE run_identities; DROP TABLE trusted_keys; DROP TABLE merges; ALTER TABLE chain DROP COLUMN merge_id; CREATE INDEX partition_rows_by_key ON partition_rows (row_key); PRAGMA user_version = 5;",
    )
    .unwrap();
    drop(c);
    let out = in_namespace(
        &d.path,
        r#"mount --bind .probity .probity && mount -o remount,bind,ro .probity || exit 90
$P history >/dev/null; echo rc=$?
"#,
    );
    let (codes, err) = codes(&out);
    assert_eq!(codes, vec![2], "{err}");
    assert!(
        err.contains("is read-only and has schema version 5")
            && err.contains("open it once where it can be written"),
        "{err}"
    );
    // Writable again, it is brought up to date and reads as before.
    let r = d.probity(&["history", "--json"]).expect(0).json();
    assert_eq!(r["runs"].as_array().unwrap().len(), 1);
    d.probity(&["audit", "--verify"]).expect(0);
    let c = rusqlite::Connection::open(d.ledger()).unwrap();
    let index: i64 = c
        .query_row(
            "SELECT count(*) FROM sqlite_schema WHERE name = 'partition_rows_by_key'",
            [],
            |r| r.get(0),
        )
        .unwrap();
    assert_eq!(index, 0, "migration 0007 drops the second index");
}
