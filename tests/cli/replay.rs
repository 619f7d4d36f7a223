//! Exact replay and the tamper-evident chain, through the binary.

use crate::fixtures::small_dir;
use crate::util::Dir;
use std::path::Path;

fn demo(d: &Dir, name: &str) {
    let ex = Path::new(env!("CARGO_MANIFEST_DIR")).join("experiments");
    d.copy(&ex.join(format!("{name}.toml")), &format!("{name}.toml"));
    for csv in ["heating-trial.csv", "bays.csv"] {
        d.copy(&ex.join(csv), csv);
    }
}

fn sql(d: &Dir, statement: &str) {
    let c = rusqlite::Connection::open(d.ledger()).unwrap();
    c.execute_batch(statement).unwrap();
}

#[test]
fn every_demo_experiment_replays_bit_for_bit() {
    let d = Dir::new("replay-demos");
    let ex = Path::new(env!("CARGO_MANIFEST_DIR")).join("experiments");
    std::fs::create_dir_all(d.path.join("models")).unwrap();
    d.copy(
        &ex.join("models/bagged_stumps.py"),
        "models/bagged_stumps.py",
    );
    let demos = [
        "heating-trial",
        "bay-yield",
        "bay-yield-hash",
        "outbreak",
        "heating-trial-stumps",
    ];
    for (i, name) in demos.iter().enumerate() {
        demo(&d, name);
        d.probity(&["run", &format!("{name}.toml"), "--threads", "2"])
            .expect(0);
        let run = (2 * i + 1).to_string();
        // A different thread count must not matter either.
        let j = d
            .probity(&[
                "replay",
                &run,
                "--json",
                "--threads",
                "1",
                "--allow-commands",
            ])
            .expect(0)
            .json();
        assert_eq!(j["identical"], true, "{name}: {j}");
        assert_eq!(j["replay_of"].as_i64(), Some(2 * i as i64 + 1));
        assert!(j["compared"].as_i64().unwrap() > 100, "{j}");
        assert!(j["differences"].as_array().unwrap().is_empty());
    }
    let s = d.probity(&["show", "2", "--json"]).expect(0).json();
    assert_eq!(s["note"], "replay of run 1");
    d.probity(&["audit", "--verify"]).expect(0);
}

#[test]
fn replay_uses_the_stored_spec_not_the_file_on_disk() {
    let d = small_dir("replay-spec");
    d.probity(&["run", "small.toml"]).expect(0);
    // The spec on disk changes afterwards; the replay must not notice.
    d.write(
        "small.toml",
        &crate::fixtures::SMALL_SPEC.replace("seed = 5", "seed = 99"),
    );
    let j = d.probity(&["replay", "1", "--json"]).expect(0).json();
    assert_eq!(j["identical"], true);
}

#[test]
fn replay_refuses_changed_data_and_reports_changed_scores() {
    let d = small_dir("replay-diff");
    d.probity(&["run", "small.toml"]).expect(0);
    // A stored score edited by hand: replay exits 5 and names it with both values.
    sql(
        &d,
        "UPDATE fold_scores SET value = 1.5 WHERE run_id = 1 AND candidate = 2 AND repeat = 0 AND fold = 1 AND part = 'validation' AND metric = 'mae'",
    );
    let r = d.probity(&["replay", "1", "--json"]).expect(5);
    let j = r.json();
    assert_eq!(j["identical"], false);
    let diffs = j["differences"].as_array().unwrap();
    let fold_diff = diffs
        .iter()
        .find(|x| x["fold"] == 1 && x["metric"] == "mae")
        .expect("the edited score is reported");
    assert_eq!(fold_diff["candidate"], 2);
    assert_eq!(fold_diff["stored"], 1.5);
    assert!(fold_diff["replayed"].as_f64().unwrap() != 1.5);
    // A changed data file is refused before anything runs.
    d.write(
        "small.csv",
        &crate::fixtures::small_csv().replace("r5,", "r55,"),
    );
    let r = d.probity(&["replay", "1"]).expect(2);
    assert!(
        r.stderr().contains("has SHA-256") && r.stderr().contains("but run 1 used"),
        "{}",
        r.stderr()
    );
}

/// Edit a score, delete a reveal, reorder entries, all with SQLite directly: each is detected
/// and located, with exit code 4.
#[test]
fn tampering_is_detected_and_located() {
    let setup = |name: &str| {
        let d = small_dir(name);
        d.probity(&["run", "small.toml"]).expect(0);
        d.probity(&["reveal", "1", "--yes"]).expect(0);
        d.probity(&["note", "1", "looked fine"]).expect(0);
        d.probity(&["run", "small.toml"]).expect(0);
        let j = d.probity(&["audit", "--verify", "--json"]).expect(0).json();
        // The partition's seal, run 1, the reveal, the note, run 2.
        assert_eq!(j["chain"]["entries"], 5);
        assert_eq!(j["chain"]["intact"], true);
        d
    };
    let broken = |d: &Dir| -> Vec<serde_json::Value> {
        let r = d.probity(&["audit", "--verify", "--json"]).expect(4);
        let j = r.json();
        assert_eq!(j["chain"]["intact"], false);
        j["chain"]["breaks"].as_array().unwrap().clone()
    };

    let d = setup("tamper-edit");
    sql(
        &d,
        "UPDATE scores SET mean = 0.001 WHERE run_id = 1 AND candidate = 1 AND part = 'validation' AND metric = 'rmse'",
    );
    let b = broken(&d);
    assert_eq!(
        (
            b[0]["seq"].as_i64(),
            b[0]["kind"].as_str(),
            b[0]["id"].as_i64()
        ),
        (Some(2), Some("run"), Some(1))
    );
    assert!(
        b[0]["what"].as_str().unwrap().contains("content changed"),
        "{b:?}"
    );
    // The plain audit also fails on a broken chain.
    let r = d.probity(&["audit"]).expect(4);
    assert!(
        r.stdout().contains("BROKEN") && r.stdout().contains("broken at entry 2 (run 1)"),
        "{}",
        r.stdout()
    );

    let d = setup("tamper-delete");
    sql(
        &d,
        "DELETE FROM reveal_scores WHERE reveal_id = 1; DELETE FROM reveals WHERE id = 1;",
    );
    let b = broken(&d);
    assert!(
        b.iter().any(|x| x["seq"] == 3
            && x["kind"] == "reveal"
            && x["what"].as_str().unwrap().contains("missing")),
        "{b:?}"
    );
    // Deleting the chain link as well leaves a gap the next entry points across.
    let d = setup("tamper-delete-link");
    sql(
        &d,
        "DELETE FROM reveal_scores WHERE reveal_id = 1; DELETE FROM reveals WHERE id = 1; DELETE FROM chain WHERE seq = 3;",
    );
    let b = broken(&d);
    assert!(
        b.iter()
            .any(|x| x["seq"] == 4 && x["what"].as_str().unwrap().contains("removed or reordered")),
        "{b:?}"
    );

    let d = setup("tamper-reorder");
    sql(
        &d,
        "UPDATE chain SET seq = 100 WHERE seq = 3; UPDATE chain SET seq = 3 WHERE seq = 4; UPDATE chain SET seq = 4 WHERE seq = 100;",
    );
    let b = broken(&d);
    assert!(
        b.iter()
            .any(|x| x["seq"] == 3 && x["what"].as_str().unwrap().contains("removed or reordered")),
        "{b:?}"
    );

    let d = setup("tamper-insert");
    sql(
        &d,
        "INSERT INTO notes (run_id, written_at, user, text) VALUES (1, '2026-01-01T00:00:00Z', 'someone', 'backdated')",
    );
    let b = broken(&d);
    assert!(
        b.iter().any(|x| x["seq"].is_null()
            && x["kind"] == "note"
            && x["what"].as_str().unwrap().contains("not on the chain")),
        "{b:?}"
    );

    // A deleted candidate leaves its scores pointing nowhere: the run's entry no longer hashes,
    // and the reference check counts the rows that lost their candidate.
    let d = setup("tamper-orphan");
    sql(
        &d,
        "PRAGMA foreign_keys = OFF; DELETE FROM candidates WHERE run_id = 2 AND id = 2",
    );
    let b = broken(&d);
    assert!(
        b.iter()
            .any(|x| x["seq"] == 5 && x["kind"] == "run" && x["id"] == 2),
        "{b:?}"
    );
    let c = rusqlite::Connection::open(d.ledger()).unwrap();
    for table in ["fold_scores", "scores"] {
        let n: i64 = c
            .query_row(
                &format!("SELECT count(*) FROM {table} WHERE run_id = 2 AND candidate = 2"),
                [],
                |r| r.get(0),
            )
            .unwrap();
        assert!(n > 0);
        assert!(
            b.iter().any(|x| x["seq"].is_null()
                && x["kind"] == table
                && x["id"] == n
                && x["what"]
                    .as_str()
                    .unwrap()
                    .contains("row of candidates that is not there")),
            "{table} {n}: {b:?}"
        );
    }
}

#[test]
fn runs_record_what_replay_needs() {
    let d = small_dir("provenance");
    d.probity(&["run", "small.toml"]).expect(0);
    let c = rusqlite::Connection::open(d.ledger()).unwrap();
    let (commit, target, digest, threads, spec_hash, data): (String, String, String, i64, String, String) = c
        .query_row("SELECT tool_commit, target_triple, predictions_digest, threads, spec_hash, data_sha256 FROM runs WHERE id = 1", [], |r| {
            Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?, r.get(5)?))
        })
        .unwrap();
    assert!(
        !commit.is_empty() && target.contains('-'),
        "{commit} {target}"
    );
    assert_eq!(digest.len(), 64);
    assert!(threads >= 1);
    assert_eq!((spec_hash.len(), data.len()), (64, 64));
}

/// Two teammates without a server: Alice packs, Bob merges (twice: idempotent); Alice's reveal
/// counts in Bob's audit; an altered bundle and a forked history are refused with exit 4.
#[test]
fn bundles_merge_verified_and_never_mix_histories() {
    let alice = small_dir("alice");
    alice.probity(&["run", "small.toml"]).expect(0);
    alice.probity(&["reveal", "1", "--yes"]).expect(0);
    alice.public_key("alice");
    alice.probity(&["pack", "1", "--out", "a.json"]).expect(0);
    let bob = small_dir("bob");
    bob.probity(&["run", "small.toml"]).expect(0);
    bob.trusts(&alice, "alice");
    std::fs::copy(alice.path.join("a.json"), bob.path.join("a.json")).unwrap();
    let r = bob.probity(&["merge", "a.json"]).expect(0);
    // Alice's seal of the partition (Bob's own, chained first, governs it here), her run
    // and her reveal.
    assert!(r.stderr().contains("merged 3 entries"), "{}", r.stderr());
    let r = bob.probity(&["merge", "a.json"]).expect(0);
    assert!(
        r.stderr().contains("merged 0 entries") && r.stderr().contains("3 already present"),
        "{}",
        r.stderr()
    );
    // Both ran the same spec on the same data: one partition, Alice's reveal counts for Bob.
    let a = bob.probity(&["audit", "--json"]).expect(0).json();
    assert_eq!(a["partitions"].as_array().unwrap().len(), 1);
    assert_eq!(a["partitions"][0]["reveals"], 1);
    assert_eq!(a["chain"]["intact"], true);
    let r = bob.probity(&["reveal", "1", "--yes"]).expect(0);
    assert!(
        r.stderr().contains(
            "consulted 2 times (2 reveal(s), 0 development use(s)), over its budget of 1"
        ),
        "{}",
        r.stderr()
    );
    bob.probity(&["audit"]).expect(3);

    // An altered bundle: one score changed by hand.
    let text = std::fs::read_to_string(alice.path.join("a.json")).unwrap();
    let mut j: serde_json::Value = serde_json::from_str(&text).unwrap();
    let run = j["entries"]
        .as_array_mut()
        .unwrap()
        .iter_mut()
        .find(|e| e["kind"] == "run")
        .unwrap();
    let sections = run["sections"].as_array_mut().unwrap();
    let fold_scores = sections
        .iter_mut()
        .find(|s| s["name"] == "fold_scores")
        .unwrap();
    fold_scores["rows"][0][6] = serde_json::json!({"r": "3ff0000000000000"});
    let carol = small_dir("carol");
    carol.trusts(&alice, "alice");
    carol.write("bad.json", &j.to_string());
    let r = carol.probity(&["merge", "bad.json"]).expect(4);
    assert!(
        r.stderr().contains("was altered") && r.stderr().contains("nothing was merged"),
        "{}",
        r.stderr()
    );

    // A fork: a copy of Alice's ledger gets a different note after the same reveal.
    let copy = small_dir("alice-copy");
    std::fs::create_dir_all(copy.path.join(".probity")).unwrap();
    std::fs::copy(alice.ledger(), copy.ledger()).unwrap();
    alice.probity(&["note", "1", "alice's note"]).expect(0);
    copy.probity(&["note", "1", "a different note"]).expect(0);
    alice.probity(&["pack", "1", "--out", "a2.json"]).expect(0);
    copy.public_key("alice-copy");
    copy.probity(&["pack", "1", "--out", "c2.json"]).expect(0);
    let dave = small_dir("dave");
    dave.trusts(&alice, "alice");
    dave.trusts(&copy, "alice-copy");
    std::fs::copy(alice.path.join("a2.json"), dave.path.join("a2.json")).unwrap();
    std::fs::copy(copy.path.join("c2.json"), dave.path.join("c2.json")).unwrap();
    dave.probity(&["merge", "a2.json"]).expect(0);
    let before = dave.counts();
    let r = dave.probity(&["merge", "c2.json"]).expect(4);
    assert!(r.stderr().contains("different histories"), "{}", r.stderr());
    assert_eq!(dave.counts(), before, "a refused merge writes nothing");
    let s = dave.probity(&["show", "1", "--json"]).expect(0).json();
    assert_eq!(s["notes"][0]["text"], "alice's note");
}

/// A tool-relevant setting changed in the stored spec (the seed) is caught: the canonical hash,
/// the partition and the scores all differ.
#[test]
fn a_changed_setting_is_caught_by_replay() {
    let d = small_dir("replay-setting");
    d.probity(&["run", "small.toml"]).expect(0);
    sql(
        &d,
        "UPDATE runs SET spec_text = replace(spec_text, 'seed = 5', 'seed = 6') WHERE id = 1",
    );
    let j = d.probity(&["replay", "1", "--json"]).expect(5).json();
    let what: Vec<&str> = j["differences"]
        .as_array()
        .unwrap()
        .iter()
        .map(|x| x["metric"].as_str().unwrap())
        .collect();
    assert!(
        what.contains(&"spec_hash") && what.contains(&"partition"),
        "{what:?}"
    );
    d.probity(&["audit", "--verify"]).expect(4);
}
