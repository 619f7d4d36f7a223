//! Hostile bundles: a merge trusts no part of a bundle's structure. Each case is built from an
//! honest pack, edited, and (where the edit touches hashed values) re-hashed by `rehash` with
//! the published recipe (`probity::ledger::chain::entry_hash`), so that only the receiver's own
//! checks stand between it and the ledger.

use crate::fixtures::small_dir;
use crate::util::Dir;
use rusqlite::types::Value as Sql;
use serde_json::{Value, json};

fn decode(v: &Value) -> Sql {
    match v {
        Value::Null => Sql::Null,
        Value::Number(n) => Sql::Integer(n.as_i64().unwrap()),
        Value::String(s) => Sql::Text(s.clone()),
        Value::Object(o) => match (o.get("r"), o.get("b")) {
            (Some(Value::String(h)), None) => {
                Sql::Real(f64::from_bits(u64::from_str_radix(h, 16).unwrap()))
            }
            (None, Some(Value::String(h))) => Sql::Blob(
                (0..h.len())
                    .step_by(2)
                    .map(|i| u8::from_str_radix(&h[i..i + 2], 16).unwrap())
                    .collect(),
            ),
            _ => panic!("{v}"),
        },
        _ => panic!("{v}"),
    }
}

/// Recompute every entry's hash from its sections, in order, carrying each new hash into the
/// later entries that link to the old one: a forged bundle that is consistent in itself.
fn rehash(bundle: &mut Value) {
    // A forger cannot sign for the sender: the forged bundle goes unsigned, and is merged with
    // --allow-unverified, so that the receiver's own checks are what is tested.
    bundle.as_object_mut().unwrap().remove("signature");
    let entries = bundle["entries"].as_array_mut().unwrap();
    let mut renamed: Vec<(String, String)> = Vec::new();
    for e in entries.iter_mut() {
        for field in ["prev_hash", "run_entry"] {
            if let Some(h) = e[field].as_str()
                && let Some((_, new)) = renamed.iter().find(|(old, _)| old == h)
            {
                e[field] = json!(new);
            }
        }
        let sections: probity::ledger::chain::Sections = e["sections"]
            .as_array()
            .unwrap()
            .iter()
            .map(|s| {
                let rows = s["rows"]
                    .as_array()
                    .unwrap()
                    .iter()
                    .map(|r| r.as_array().unwrap().iter().map(decode).collect())
                    .collect();
                (s["name"].as_str().unwrap().to_string(), rows)
            })
            .collect();
        let new = probity::ledger::chain::entry_hash(e["prev_hash"].as_str().unwrap(), &sections);
        let old = e["entry_hash"].as_str().unwrap().to_string();
        e["entry_hash"] = json!(new);
        renamed.push((old, new));
    }
}

/// Alice's run 1 with a reveal and a note, packed; Bob's ledger with his own run of the same
/// spec on the same data (so the same partition); and the bundle as JSON.
fn alice_and_bob(name: &str) -> (Dir, Value) {
    let alice = small_dir(&format!("{name}-alice"));
    alice.probity(&["run", "small.toml"]).expect(0);
    alice.probity(&["reveal", "1", "--yes"]).expect(0);
    alice.probity(&["note", "1", "checked"]).expect(0);
    alice.public_key("alice");
    alice.probity(&["pack", "1", "--out", "a.json"]).expect(0);
    let bundle =
        serde_json::from_str(&std::fs::read_to_string(alice.path.join("a.json")).unwrap()).unwrap();
    let bob = small_dir(&format!("{name}-bob"));
    bob.probity(&["run", "small.toml"]).expect(0);
    bob.trusts(&alice, "alice");
    (bob, bundle)
}

fn section<'a>(bundle: &'a mut Value, kind: &str, name: &str) -> &'a mut Value {
    bundle["entries"]
        .as_array_mut()
        .unwrap()
        .iter_mut()
        .find(|e| e["kind"] == kind)
        .unwrap()["sections"]
        .as_array_mut()
        .unwrap()
        .iter_mut()
        .find(|s| s["name"] == name)
        .unwrap()
}

/// Merge `bundle` into `bob`: exit `code`, every fragment in the message, Bob's ledger unchanged
/// and its chain intact.
fn refused(bob: &Dir, bundle: &Value, code: i32, fragments: &[&str]) {
    let before = bob.counts();
    bob.write("b.json", &bundle.to_string());
    let r = bob
        .probity(&["merge", "b.json", "--allow-unverified"])
        .expect(code);
    for f in fragments {
        assert!(r.stderr().contains(f), "expected {f:?} in {}", r.stderr());
    }
    assert_eq!(bob.counts(), before, "a refused merge writes nothing");
    bob.probity(&["audit", "--verify"]).expect(0);
}

/// The entry hash covers values, not the names they are stored under: two names swapped
/// (a reveal's budget and resamples) keep every hash, and a name holding SQL would be run.
/// Both are refused (exit 2) because the columns are not the schema's.
#[test]
fn column_names_from_a_bundle_never_reach_sql() {
    let (bob, honest) = alice_and_bob("bundle-names");
    let mut swapped = honest.clone();
    let cols = &mut section(&mut swapped, "reveal", "reveals")["columns"];
    let names: Vec<String> = serde_json::from_value(cols.clone()).unwrap();
    let (b, r) = (
        names.iter().position(|c| c == "budget").unwrap(),
        names.iter().position(|c| c == "resamples").unwrap(),
    );
    cols[b] = json!("resamples");
    cols[r] = json!("budget");
    refused(
        &bob,
        &swapped,
        2,
        &["reveals section has the columns", "nothing was merged"],
    );
    let mut injected = honest.clone();
    section(&mut injected, "note", "notes")["columns"][4] =
        json!("text) SELECT 1; UPDATE notes SET text = 'rewritten' --");
    refused(&bob, &injected, 2, &["notes section has the columns"]);
    // The honest bundle still merges.
    bob.write("a.json", &honest.to_string());
    bob.probity(&["merge", "a.json"]).expect(0);
    let a = bob.probity(&["audit", "--json"]).expect(0).json();
    assert_eq!(a["partitions"][0]["reveals"], 1);
}

/// A forged run over the receiver's own partition with one extra test-row identity: it
/// re-hashes cleanly, but storing it would change the receiver's earlier run. Refused (exit 4)
/// as a conflict, and the receiver's chain still verifies.
#[test]
fn a_bundle_cannot_change_a_partition_the_ledger_holds() {
    let (bob, mut forged) = alice_and_bob("bundle-partition");
    let rows = section(&mut forged, "run", "partition_rows")["rows"]
        .as_array_mut()
        .unwrap();
    let mut extra = rows[0].clone();
    extra[1] = json!({"b": "ff".repeat(16)});
    rows.push(extra);
    rehash(&mut forged);
    refused(
        &bob,
        &forged,
        4,
        &[
            "partition_rows section conflicts with this ledger",
            "nothing was merged",
        ],
    );
}

/// A constraint the bundle's rows break (two candidates under one id) ends with exit 4 and a
/// message, never exit 1.
#[test]
fn rows_that_break_the_schema_are_an_integrity_failure() {
    let (bob, mut forged) = alice_and_bob("bundle-constraint");
    let rows = section(&mut forged, "run", "candidates")["rows"]
        .as_array_mut()
        .unwrap();
    let copy = rows[0].clone();
    rows.push(copy);
    rehash(&mut forged);
    refused(
        &bob,
        &forged,
        4,
        &["does not fit this ledger", "nothing was merged"],
    );
}

/// Text beyond what a ledger keeps (a 17 KiB note, a 2 MiB spec) is refused (exit 2) before
/// anything is written, however consistent the bundle's hashes.
#[test]
fn oversized_text_in_a_bundle_is_refused() {
    let (bob, honest) = alice_and_bob("bundle-sizes");
    let mut long_note = honest.clone();
    section(&mut long_note, "note", "notes")["rows"][0][4] = json!("x".repeat(17 * 1024));
    rehash(&mut long_note);
    refused(
        &bob,
        &long_note,
        2,
        &["notes.text text of 17408 bytes", "16384"],
    );
    let mut long_spec = honest.clone();
    let runs = section(&mut long_spec, "run", "runs");
    let cols: Vec<String> = serde_json::from_value(runs["columns"].clone()).unwrap();
    let at = cols.iter().position(|c| c == "spec_text").unwrap();
    runs["rows"][0][at] = json!("#".repeat(2 << 20));
    rehash(&mut long_spec);
    refused(
        &bob,
        &long_spec,
        2,
        &["runs.spec_text text of 2097152 bytes"],
    );
}

/// Replace every string `from` in the bundle by `to` (an id under all the names it is stored).
fn replace_text(v: &mut Value, from: &str, to: &str) {
    match v {
        Value::String(s) if s == from => *s = to.to_string(),
        Value::Array(a) => a.iter_mut().for_each(|x| replace_text(x, from, to)),
        Value::Object(o) => o.values_mut().for_each(|x| replace_text(x, from, to)),
        _ => {}
    }
}

/// An entry of a kind the ledger does not chain is refused at once (exit 4), not left to a
/// constraint of the schema (which exited 1).
#[test]
fn an_entry_of_an_unknown_kind_is_refused() {
    let (bob, mut forged) = alice_and_bob("bundle-kind");
    let note = forged["entries"]
        .as_array_mut()
        .unwrap()
        .iter_mut()
        .find(|e| e["kind"] == "note")
        .unwrap();
    note["kind"] = json!("memo");
    note["sections"] = json!([]);
    rehash(&mut forged);
    refused(
        &bob,
        &forged,
        4,
        &["of kind \"memo\"", "nothing was merged"],
    );
}

/// Values that hash cleanly but that the ledger could not read back later (a stored model
/// that is not one, split settings that are not JSON, a spec that is not TOML) are refused at
/// the merge (exit 4), not stored to fail a later `predict` with exit 1.
#[test]
fn values_the_ledger_could_not_read_back_are_refused() {
    let (bob, honest) = alice_and_bob("bundle-content");
    let cases: [(&str, &str, Value, &str); 4] = [
        (
            "runs",
            "model_json",
            json!("{not json"),
            "runs.model_json is not a stored model",
        ),
        (
            "runs",
            "model_json",
            json!("{\"candidate\": 1}"),
            "runs.model_json is not a stored model",
        ),
        (
            "runs",
            "spec_text",
            json!("name = = 1"),
            "runs.spec_text is not TOML",
        ),
        (
            "partitions",
            "settings",
            json!("{]"),
            "partitions.settings is not JSON",
        ),
    ];
    for (name, column, value, fragment) in cases {
        let mut forged = honest.clone();
        let s = section(&mut forged, "run", name);
        let cols: Vec<String> = serde_json::from_value(s["columns"].clone()).unwrap();
        let at = cols.iter().position(|c| c == column).unwrap();
        s["rows"][0][at] = value;
        rehash(&mut forged);
        refused(&bob, &forged, 4, &[fragment, "nothing was merged"]);
    }
}

/// A run moved under another partition id (every place the id is stored, re-hashed) merges,
/// since the receiver cannot rebuild a partition without the data; `reveal` rebuilds it from
/// the spec and the data and refuses the altered record with exit 4 (it was exit 1), and
/// nothing is counted.
#[test]
fn a_run_under_a_forged_partition_id_is_refused_at_reveal() {
    let (bob, mut forged) = alice_and_bob("bundle-partition-id");
    let id = section(&mut forged, "run", "runs");
    let cols: Vec<String> = serde_json::from_value(id["columns"].clone()).unwrap();
    let at = cols.iter().position(|c| c == "partition_id").unwrap();
    let old = id["rows"][0][at].as_str().unwrap().to_string();
    replace_text(&mut forged, &old, "0123456789abcdef");
    rehash(&mut forged);
    bob.write("b.json", &forged.to_string());
    bob.probity(&["merge", "b.json", "--allow-unverified"])
        .expect(0);
    let before = bob.counts();
    let r = bob
        .probity(&["reveal", "2", "--yes", "--data", "small.csv"])
        .expect(4);
    assert!(
        r.stderr()
            .contains("stored over partition 0123456789abcdef")
            && r.stderr().contains("record was altered"),
        "{}",
        r.stderr()
    );
    assert_eq!(bob.counts(), before, "nothing is counted");
}

/// Sign `bundle` as its sender would, with the key file in `signer`'s config folder (a sender
/// running a modified probity, say): the library's own message and signature.
fn sign_as(signer: &Dir, bundle: &mut Value) {
    let key = probity::signing::Key::load(
        &signer
            .path
            .join(".config")
            .join("probity")
            .join("signing-key.json"),
    )
    .unwrap();
    let public = key.public_hex();
    let message = probity::signing::signed_message(bundle, &key.name, &public).unwrap();
    bundle["signature"] =
        json!({"signer": key.name, "public_key": public, "signature": key.sign(&message)});
}

/// Who made a bundle is checked: an unsigned bundle and one signed with a key the receiver does
/// not trust are refused (exit 4) until the key is trusted, or merged with --allow-unverified,
/// which `audit` then reports; a bundle changed after signing fails its signature.
#[test]
fn only_bundles_signed_with_a_trusted_key_merge_unasked() {
    let alice = small_dir("sign-alice");
    alice.probity(&["run", "small.toml"]).expect(0);
    alice.probity(&["reveal", "1", "--yes"]).expect(0);
    let r = alice.probity(&["pack", "1", "--out", "a.json"]).expect(2);
    assert!(
        r.stderr().contains("probity key new") && r.stderr().contains("--unsigned"),
        "{}",
        r.stderr()
    );
    let key = alice.public_key("alice");
    let r = alice.probity(&["pack", "1", "--out", "a.json"]).expect(0);
    assert!(
        r.stderr()
            .contains(&format!("signed by \"alice\" (key {key})")),
        "{}",
        r.stderr()
    );
    alice
        .probity(&["pack", "1", "--out", "u.json", "--unsigned"])
        .expect(0);
    let signed: Value =
        serde_json::from_str(&std::fs::read_to_string(alice.path.join("a.json")).unwrap()).unwrap();
    let unsigned: Value =
        serde_json::from_str(&std::fs::read_to_string(alice.path.join("u.json")).unwrap()).unwrap();
    assert!(unsigned["signature"].is_null());

    let bob = small_dir("sign-bob");
    bob.probity(&["run", "small.toml"]).expect(0);
    let before = bob.counts();
    bob.write("a.json", &signed.to_string());
    let r = bob.probity(&["merge", "a.json"]).expect(4);
    assert!(
        r.stderr().contains("does not trust")
            && r.stderr()
                .contains(&format!("probity key trust alice {key}")),
        "{}",
        r.stderr()
    );
    bob.write("u.json", &unsigned.to_string());
    let r = bob.probity(&["merge", "u.json"]).expect(4);
    assert!(r.stderr().contains("is not signed"), "{}", r.stderr());
    assert_eq!(bob.counts(), before);

    // Changed after signing: another creation time, or an entry left out.
    let mut later = signed.clone();
    later["created_at"] = json!("2020-01-01T00:00:00.000Z");
    let mut fewer = signed.clone();
    fewer["entries"].as_array_mut().unwrap().pop();
    for b in [&later, &fewer] {
        bob.write("x.json", &b.to_string());
        let r = bob
            .probity(&["merge", "x.json", "--allow-unverified"])
            .expect(4);
        assert!(r.stderr().contains("signature"), "{}", r.stderr());
    }
    assert_eq!(bob.counts(), before);

    // Trusted, it merges and says by whom; the merge is on record.
    bob.probity(&["key", "trust", "alice", &key]).expect(0);
    let r = bob.probity(&["merge", "a.json"]).expect(0);
    assert!(
        r.stderr().contains("trusted here as \"alice\""),
        "{}",
        r.stderr()
    );
    let a = bob.probity(&["audit", "--json"]).expect(0).json();
    assert_eq!(a["merges"][0]["verdict"], "trusted");
    assert_eq!(a["merges"][0]["trusted_as"], "alice");
    assert!(a["warnings"].as_array().unwrap().is_empty(), "{a}");

    // Unverified, it merges only when asked, and audit says so.
    let carol = small_dir("sign-carol");
    carol.write("u.json", &unsigned.to_string());
    carol
        .probity(&["merge", "u.json", "--allow-unverified"])
        .expect(0);
    let a = carol.probity(&["audit", "--json"]).expect(0).json();
    assert_eq!(a["merges"][0]["verdict"], "unsigned");
    assert!(
        a["warnings"][0]
            .as_str()
            .unwrap()
            .contains("that was not signed"),
        "{a}"
    );
    let text = carol.probity(&["audit"]).expect(0).stdout();
    assert!(text.contains("--allow-unverified"), "{text}");
}

/// A bundle carries every consultation of each partition it ships, and says how many: packing
/// run 1 brings run 2 (same partition) and its reveal. A sender whose bundle leaves a reveal
/// out, signed all the same, is refused by the count.
#[test]
fn a_bundle_carries_and_counts_every_reveal_of_its_partitions() {
    let alice = small_dir("count-alice");
    alice.probity(&["run", "small.toml"]).expect(0);
    alice.probity(&["run", "small.toml"]).expect(0);
    alice.probity(&["reveal", "2", "--yes"]).expect(0);
    alice.public_key("alice");
    let r = alice.probity(&["pack", "1", "--out", "a.json"]).expect(0);
    assert!(
        r.stderr().contains("also packed runs [2]"),
        "{}",
        r.stderr()
    );
    let bundle: Value =
        serde_json::from_str(&std::fs::read_to_string(alice.path.join("a.json")).unwrap()).unwrap();
    assert_eq!(bundle["partitions"][0]["reveals"], 1);
    assert_eq!(bundle["partitions"][0]["uses"], 0);
    let bob = small_dir("count-bob");
    bob.trusts(&alice, "alice");
    bob.write("a.json", &bundle.to_string());
    let mut partial = bundle.clone();
    partial["entries"]
        .as_array_mut()
        .unwrap()
        .retain(|e| e["kind"] != "reveal");
    sign_as(&alice, &mut partial);
    refused(
        &bob,
        &partial,
        4,
        &["carries 0 reveal(s)", "holds 1 and 0", "left out"],
    );
    bob.probity(&["merge", "a.json"]).expect(0);
    let a = bob.probity(&["audit", "--json"]).expect(0).json();
    assert_eq!(a["partitions"][0]["reveals"], 1);
}

/// Each partition's (reveals, development uses) as `audit --json` lists them, by id (audit
/// exits 3 when one is over budget, which these cases are).
fn consultations(d: &Dir) -> Vec<(String, Value, usize)> {
    let r = d.probity(&["audit", "--json"]);
    assert!([0, 3].contains(&r.code()), "{}", r.stderr());
    let mut out: Vec<(String, Value, usize)> = r.json()["partitions"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| {
            (
                p["id"].as_str().unwrap().to_string(),
                p["reveals"].clone(),
                p["development_uses"].as_array().unwrap().len(),
            )
        })
        .collect();
    out.sort_by(|a, b| a.0.cmp(&b.0));
    out
}

fn read_bundle(d: &Dir, file: &str) -> Value {
    serde_json::from_str(&std::fs::read_to_string(d.path.join(file)).unwrap()).unwrap()
}

/// The rows of section `name` of an entry.
fn rows_of<'a>(e: &'a Value, name: &str) -> &'a Vec<Value> {
    e["sections"]
        .as_array()
        .unwrap()
        .iter()
        .find(|s| s["name"] == name)
        .unwrap()["rows"]
        .as_array()
        .unwrap()
}

/// Carol's run 1 (seed 5) and its reveal, merged by Dave; then two more reveals of run 1, and
/// run 2 (seed 6: its test rows overlap run 1's, and some of its development rows are run 1's
/// test rows) with a reveal, which counts against both partitions. Returns Carol, Dave and the
/// partition of run 1.
fn carol_and_dave(name: &str) -> (Dir, Dir, String) {
    let carol = small_dir(&format!("{name}-carol"));
    carol.write(
        "s6.toml",
        &crate::fixtures::SMALL_SPEC.replace("seed = 5", "seed = 6"),
    );
    carol.probity(&["run", "small.toml"]).expect(0);
    carol.probity(&["reveal", "1", "--yes"]).expect(0);
    carol.public_key("carol");
    carol.probity(&["pack", "1", "--out", "b1.json"]).expect(0);
    let dave = Dir::new(&format!("{name}-dave"));
    dave.trusts(&carol, "carol");
    dave.write("b1.json", &read_bundle(&carol, "b1.json").to_string());
    dave.probity(&["merge", "b1.json"]).expect(0);
    carol.probity(&["reveal", "1", "--yes"]).expect(0);
    carol.probity(&["reveal", "1", "--yes"]).expect(0);
    carol.probity(&["run", "s6.toml"]).expect(0);
    carol.probity(&["reveal", "2", "--yes"]).expect(0);
    let p1 = carol.probity(&["show", "1", "--json"]).expect(0).json()["partition"]["id"]
        .as_str()
        .unwrap()
        .to_string();
    (carol, dave, p1)
}

/// A bundle ships every partition its reveals and development uses count against, not only its
/// runs' own: packing run 2 brings run 1 (over the partition run 2's reveal and development
/// rows consult) with all its reveals, and states that partition's count. Dave then sees what
/// Carol sees (he saw 2 of run 1's partition's 4 reveals before), and a ledger that never held
/// that partition merges the bundle whole (it failed with a foreign-key error).
#[test]
fn a_bundle_ships_every_partition_its_consultations_count_against() {
    let (carol, dave, p1) = carol_and_dave("consulted");
    let theirs = consultations(&carol);
    assert!(
        theirs
            .iter()
            .any(|(p, r, u)| *p == p1 && *r == 4 && *u == 1),
        "run 2's reveal and development rows count against run 1's partition: {theirs:?}"
    );
    let r = carol.probity(&["pack", "2", "--out", "b2.json"]).expect(0);
    assert!(
        r.stderr().contains("also packed runs [1]"),
        "{}",
        r.stderr()
    );
    let bundle = read_bundle(&carol, "b2.json");
    assert!(
        bundle["partitions"]
            .as_array()
            .unwrap()
            .iter()
            .any(|p| p["id"] == p1.as_str() && p["reveals"] == 4 && p["uses"] == 1),
        "{}",
        bundle["partitions"]
    );
    dave.write("b2.json", &bundle.to_string());
    dave.probity(&["merge", "b2.json"]).expect(0);
    assert_eq!(consultations(&dave), theirs);
    dave.probity(&["audit", "--verify"]).expect(0);
    let erin = Dir::new("consulted-erin");
    erin.trusts(&carol, "carol");
    erin.write("b2.json", &bundle.to_string());
    erin.probity(&["merge", "b2.json"]).expect(0);
    assert_eq!(consultations(&erin), theirs);
    erin.probity(&["audit", "--verify"]).expect(0);
}

/// Run 2's bundle as a packer that ships only its runs' own partitions wrote it: no run 1, no
/// reveals of run 1, no seal or count of run 1's partition; run 2's reveal and development use
/// of that partition still in it.
fn without_partition(honest: &Value, p1: &str) -> Value {
    let mut b = honest.clone();
    // (A bundle packed before the fix holds no run over that partition: nothing to take out.)
    let run1: Option<Value> = b["entries"]
        .as_array()
        .unwrap()
        .iter()
        .find(|e| e["kind"] == "run" && rows_of(e, "partitions").first().unwrap()[0] == json!(p1))
        .map(|e| e["entry_hash"].clone());
    b["entries"].as_array_mut().unwrap().retain(|e| {
        run1.as_ref()
            .is_none_or(|h| e["entry_hash"] != *h && e["run_entry"] != *h)
            && !(e["kind"] == "seal" && rows_of(e, "seals")[0][1] == json!(p1))
    });
    b["partitions"]
        .as_array_mut()
        .unwrap()
        .retain(|p| p["id"] != p1);
    b
}

/// A signed bundle that carries a reveal or development use of a partition whose count it does
/// not state is refused (exit 4), nothing written; without a signature or counts, a reveal of
/// a partition that neither the bundle nor the ledger holds is refused with a message saying
/// so (exit 2), never SQLite's foreign-key error.
#[test]
fn consultations_of_a_partition_with_no_stated_count_are_refused() {
    let (carol, dave, p1) = carol_and_dave("uncounted");
    carol.probity(&["pack", "2", "--out", "b2.json"]).expect(0);
    let honest = read_bundle(&carol, "b2.json");
    let mut short = without_partition(&honest, &p1);
    assert!(
        short["entries"]
            .as_array()
            .unwrap()
            .iter()
            .any(|e| e["kind"] == "reveal" && rows_of(e, "reveals")[0][3] == json!(p1.as_str())),
        "run 2's reveal through run 1's partition stays"
    );
    sign_as(&carol, &mut short);
    let before = dave.counts();
    dave.write("s.json", &short.to_string());
    let r = dave.probity(&["merge", "s.json"]).expect(4);
    assert!(
        r.stderr()
            .contains(&format!("of partition {p1} but states no count"))
            && r.stderr().contains("nothing was merged"),
        "{}",
        r.stderr()
    );
    assert_eq!(dave.counts(), before);

    let erin = Dir::new("uncounted-erin");
    erin.trusts(&carol, "carol");
    let mut bare = without_partition(&honest, &p1);
    bare.as_object_mut().unwrap().remove("signature");
    bare.as_object_mut().unwrap().remove("partitions");
    erin.write("u.json", &bare.to_string());
    let before = erin.counts();
    let r = erin
        .probity(&["merge", "u.json", "--allow-unverified"])
        .expect(2);
    assert!(
        r.stderr().contains(&format!(
            "counts against partition {p1}, which neither the bundle nor this ledger holds"
        )) && !r.stderr().contains("FOREIGN KEY"),
        "{}",
        r.stderr()
    );
    assert_eq!(erin.counts(), before);
}

/// A reveal can count against a partition whose first run finishes after it (the partition is
/// stored at that run's start): in chain order the reveal comes before the run that brings the
/// partition. Such an honest bundle merges into a ledger without the partition (references are
/// checked when the merge commits, not entry by entry).
#[test]
fn a_reveal_may_precede_the_run_that_brings_its_partition() {
    if !crate::util::pauses_compiled("a_reveal_may_precede_the_run_that_brings_its_partition") {
        return;
    }
    let carol = small_dir("order-carol");
    carol.write(
        "s6.toml",
        &crate::fixtures::SMALL_SPEC.replace("seed = 5", "seed = 6"),
    );
    let go = carol.path.join("go");
    let (mut first, _err) = crate::consult::paused_run(&carol, "small.toml", Some(&go));
    carol.probity(&["run", "s6.toml"]).expect(0);
    carol.probity(&["reveal", "1", "--yes"]).expect(0);
    std::fs::write(&go, "").unwrap();
    assert!(first.wait().unwrap().success());
    let p1 = carol.probity(&["show", "2", "--json"]).expect(0).json()["partition"]["id"]
        .as_str()
        .unwrap()
        .to_string();
    carol.public_key("carol");
    carol.probity(&["pack", "1", "--out", "b.json"]).expect(0);
    let bundle = read_bundle(&carol, "b.json");
    let kinds: Vec<(&str, bool)> = bundle["entries"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| {
            let p = match e["kind"].as_str().unwrap() {
                "reveal" => rows_of(e, "reveals").iter().any(|r| r[3] == json!(p1)),
                "run" => rows_of(e, "partitions")[0][0] == json!(p1),
                _ => false,
            };
            (e["kind"].as_str().unwrap(), p)
        })
        .collect();
    let reveal = kinds.iter().position(|k| *k == ("reveal", true));
    let run = kinds.iter().position(|k| *k == ("run", true));
    assert!(
        reveal.is_some() && run.is_some() && reveal < run,
        "the reveal through the partition comes first: {kinds:?}"
    );
    let erin = Dir::new("order-erin");
    erin.trusts(&carol, "carol");
    erin.write("b.json", &bundle.to_string());
    erin.probity(&["merge", "b.json"]).expect(0);
    assert_eq!(consultations(&erin), consultations(&carol));
    erin.probity(&["audit", "--verify"]).expect(0);
}

/// A signer name with control characters: a key file holding one is refused (exit 2) with the
/// name escaped, and a bundle signed under one is refused at merge (exit 4), trusted key or
/// not, --allow-unverified or not; no escape code reaches the terminal.
#[test]
fn signer_names_cannot_carry_control_characters() {
    let name = "al\u{1b}[2J\u{1b}]0;pwned\u{7}ice";
    let mallory = small_dir("escape-mallory");
    mallory.probity(&["run", "small.toml"]).expect(0);
    mallory.public_key("mallory");
    let file = mallory
        .path
        .join(".config")
        .join("probity")
        .join("signing-key.json");
    let mut key: Value = serde_json::from_str(&std::fs::read_to_string(&file).unwrap()).unwrap();
    key["name"] = json!(name);
    std::fs::write(&file, key.to_string()).unwrap();
    for args in [&["key", "show"][..], &["pack", "1", "--out", "m.json"]] {
        let r = mallory.probity(args).expect(2);
        assert!(
            r.stderr().contains("control characters")
                && r.stderr().contains("\\u{1b}")
                && !r.stderr().contains('\u{1b}')
                && !r.stdout().contains('\u{1b}'),
            "{}",
            r.stderr()
        );
    }

    // A bundle signed under that name by a modified probity (the library's own signature).
    mallory
        .probity(&["pack", "1", "--out", "m.json", "--unsigned"])
        .expect(0);
    let mut bundle = read_bundle(&mallory, "m.json");
    let k = probity::signing::Key::generate(name).unwrap();
    let message = probity::signing::signed_message(&bundle, name, &k.public_hex()).unwrap();
    bundle["signature"] =
        json!({"signer": name, "public_key": k.public_hex(), "signature": k.sign(&message)});
    let bob = small_dir("escape-bob");
    bob.probity(&["run", "small.toml"]).expect(0);
    bob.write("m.json", &bundle.to_string());
    let before = bob.counts();
    let check = |args: &[&str]| {
        let r = bob.probity(args).expect(4);
        assert!(
            r.stderr().contains("signer name")
                && r.stderr().contains("control characters")
                && !r.stderr().contains('\u{1b}')
                && !r.stderr().contains('\u{7}'),
            "{}",
            r.stderr()
        );
        assert_eq!(bob.counts(), before);
    };
    check(&["merge", "m.json"]);
    check(&["merge", "m.json", "--allow-unverified"]);
    bob.probity(&["key", "trust", "mallory", &k.public_hex()])
        .expect(0);
    let before = bob.counts();
    let r = bob.probity(&["merge", "m.json"]).expect(4);
    assert!(!r.stderr().contains('\u{1b}'), "{}", r.stderr());
    assert_eq!(bob.counts(), before);
}

/// One name, one key: a second key under a trusted name is refused (exit 2), and a bundle
/// signed in a trusted name with another key is refused as a likely impersonation, without
/// suggesting to trust that key under the name.
#[test]
fn a_trusted_name_cannot_take_a_second_key() {
    let alice = small_dir("name-alice");
    let mallory = small_dir("name-mallory");
    mallory.probity(&["run", "small.toml"]).expect(0);
    let fake = mallory.public_key("alice");
    mallory.probity(&["pack", "1", "--out", "m.json"]).expect(0);
    let bob = Dir::new("name-bob");
    bob.trusts(&alice, "alice");
    let real = alice.public_key("alice");
    let before = bob.counts();
    let r = bob.probity(&["key", "trust", "alice", &fake]).expect(2);
    assert!(
        r.stderr().contains("\"alice\" is trusted already") && r.stderr().contains(&real),
        "{}",
        r.stderr()
    );
    assert_eq!(bob.counts(), before);
    let listed = bob.probity(&["key", "list", "--json"]).expect(0).json();
    assert_eq!(listed["trusted_keys"].as_array().unwrap().len(), 1);

    bob.write("m.json", &read_bundle(&mallory, "m.json").to_string());
    let r = bob.probity(&["merge", "m.json"]).expect(4);
    let e = r.stderr();
    assert!(
        e.contains(&format!("trusts \"alice\" with another key ({real})"))
            && e.contains("someone else may be using their name")
            && !e.contains("key trust alice"),
        "{e}"
    );
    assert_eq!(bob.counts(), before);
}

/// `audit`'s text labels each warning by what it is: an overlap of test rows as `overlap:`, a
/// merge of an unsigned bundle as `unverified merge:` (it was `overlap:` too). The JSON keeps
/// its list of sentences.
#[test]
fn audit_labels_each_warning_by_what_it_is() {
    let (carol, _dave, _) = carol_and_dave("labels");
    let other = small_dir("labels-other");
    other.probity(&["run", "small.toml"]).expect(0);
    other
        .probity(&["pack", "1", "--out", "u.json", "--unsigned"])
        .expect(0);
    carol.write("u.json", &read_bundle(&other, "u.json").to_string());
    carol
        .probity(&["merge", "u.json", "--allow-unverified"])
        .expect(0);
    let text = carol.probity(&["audit"]).expect(3).stdout();
    let lines: Vec<&str> = text.lines().collect();
    assert!(
        lines
            .iter()
            .any(|l| l.starts_with("unverified merge: merge 1 ") && l.contains("not signed")),
        "{text}"
    );
    assert!(
        lines
            .iter()
            .any(|l| l.starts_with("overlap: ") && !l.contains("merge")),
        "{text}"
    );
    assert!(!text.contains("overlap: merge"), "{text}");
    let j = carol.probity(&["audit", "--json"]).expect(3).json();
    assert!(
        j["warnings"]
            .as_array()
            .unwrap()
            .iter()
            .any(|w| w.as_str().unwrap().starts_with("merge 1 ")),
        "{j}"
    );
}

/// A partition stored before seals were entries follows its first run's `[guard]`: a bundle
/// that brings a seal entry for it afterwards (a colleague's run of a looser copy of the
/// spec) changes nothing, since the ledger's own first run comes first in chain order.
#[test]
fn a_merged_seal_cannot_loosen_a_partition_sealed_by_an_older_run() {
    let strict = format!("{}\n[guard]\nreveals = 1\n", crate::fixtures::SMALL_SPEC);
    let loose = format!("{}\n[guard]\nreveals = 1000\n", crate::fixtures::SMALL_SPEC);
    let old = crate::fixtures::small_dir("seal-order-old");
    old.write("strict.toml", &strict);
    // As a probity before schema 11 stored it: no seal entry.
    crate::fixtures::library_run(
        &old,
        "strict.toml",
        &old.ledger(),
        probity::data::Identity::CURRENT,
    );
    let other = crate::fixtures::small_dir("seal-order-other");
    other.write("loose.toml", &loose);
    other.probity(&["run", "loose.toml"]).expect(0);
    other
        .probity(&["pack", "1", "--unsigned", "--out", "loose.json"])
        .expect(0);
    old.copy(&other.path.join("loose.json"), "loose.json");
    old.probity(&["merge", "loose.json", "--allow-unverified"])
        .expect(0);
    old.probity(&["reveal", "1", "--yes"]).expect(0);
    let r = old.probity(&["reveal", "1", "--yes"]).expect(0);
    assert!(
        r.stderr().contains("over its budget of 1"),
        "{}",
        r.stderr()
    );
    let a = old.probity(&["audit", "--json"]).expect(3).json();
    assert_eq!(a["partitions"][0]["budget"], 1, "{a}");
    assert_eq!(a["chain"]["intact"], true);
}
