//! Bundles: chained entries written to a self-contained JSON file (`pack`) and merged into
//! another ledger (`merge`), verified entry by entry, never silently mixing two histories.

use super::chain::{Sections, entry_hash, section_queries};
use super::{Ledger, migrate, sql_err};
use crate::error::{Error, Result};
use rusqlite::OptionalExtension;
use rusqlite::types::Value as Sql;
use serde_json::{Value, json};

pub const FORMAT: &str = "probity-bundle-1";

/// The longest text value a bundle may bring (a spec, a warning, a setting), in bytes: far
/// above anything probity writes, far below what would strain the receiver. Notes have their
/// own, smaller limit (`NOTE_MAX_BYTES`).
pub const TEXT_MAX_BYTES: usize = 1 << 20;

fn encode(v: &Sql) -> Value {
    match v {
        Sql::Null => Value::Null,
        Sql::Integer(i) => json!(i),
        Sql::Real(f) => json!({"r": format!("{:016x}", f.to_bits())}),
        Sql::Text(t) => json!(t),
        Sql::Blob(b) => json!({"b": crate::spec::hex(b)}),
    }
}

fn decode(v: &Value) -> Option<Sql> {
    Some(match v {
        Value::Null => Sql::Null,
        Value::Number(n) => Sql::Integer(n.as_i64()?),
        Value::String(s) => Sql::Text(s.clone()),
        Value::Object(o) => match (o.get("r"), o.get("b")) {
            (Some(Value::String(h)), None) => {
                Sql::Real(f64::from_bits(u64::from_str_radix(h, 16).ok()?))
            }
            (None, Some(Value::String(h))) => Sql::Blob(
                (0..h.len())
                    .step_by(2)
                    .map(|i| u8::from_str_radix(h.get(i..i + 2)?, 16).ok())
                    .collect::<Option<Vec<u8>>>()?,
            ),
            _ => return None,
        },
        _ => return None,
    })
}

/// Who signed a bundle, as this ledger sees it.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Signer {
    /// Signed with a key this ledger trusts, under the name it trusts it as.
    Trusted {
        name: String,
        key: String,
        trusted_as: String,
    },
    /// Signed with a key this ledger does not list.
    Untrusted { name: String, key: String },
    /// No signature.
    Unsigned,
}

impl Signer {
    fn verdict(&self) -> &'static str {
        match self {
            Signer::Trusted { .. } => "trusted",
            Signer::Untrusted { .. } => "untrusted",
            Signer::Unsigned => "unsigned",
        }
    }
}

/// What a merge did.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Merged {
    pub merged: usize,
    pub skipped: usize,
    pub signer: Signer,
}

/// The partitions a bundle of the runs `?1` (a JSON array of ids) ships, as the SQL table
/// `shipped(id)`: each run's own partition, and every partition one of their reveals or
/// development uses consults (a reveal of another partition's test rows counts against that
/// partition, and a run's development rows may be another partition's test rows).
const SHIPPED: &str = "chosen(id) AS (SELECT value FROM json_each(?1)),
     shipped(id) AS (SELECT partition_id FROM runs WHERE id IN chosen
         UNION SELECT partition_id FROM reveals WHERE run_id IN chosen
         UNION SELECT partition_id FROM uses WHERE run_id IN chosen)";

/// The runs a bundle of `runs` must carry: those, every run with a reveal or a development use
/// of a partition the bundle ships (`SHIPPED`), and for a shipped partition that none of them
/// runs over, the first run over it (which brings the partition itself, so that the reveals
/// counted against it can be stored), until no more are needed; in id order. So a bundle
/// carries every consultation of each partition it ships.
fn closure(conn: &rusqlite::Connection, runs: &[i64]) -> Result<Vec<i64>> {
    let mut all: std::collections::BTreeSet<i64> = runs.iter().copied().collect();
    let mut st = conn
        .prepare(&format!(
            "WITH {SHIPPED}
             SELECT run_id FROM reveals WHERE partition_id IN shipped
             UNION SELECT run_id FROM uses WHERE partition_id IN shipped
             UNION SELECT min(id) FROM runs WHERE partition_id IN shipped
                 AND partition_id NOT IN (SELECT partition_id FROM runs WHERE id IN chosen)
                 GROUP BY partition_id"
        ))
        .map_err(sql_err("pack"))?;
    loop {
        let ids = json!(all.iter().collect::<Vec<_>>()).to_string();
        let more: Vec<i64> = st
            .query_map([&ids], |r| r.get(0))
            .and_then(|rows| rows.collect())
            .map_err(sql_err("pack"))?;
        let before = all.len();
        all.extend(more);
        if all.len() == before {
            return Ok(all.into_iter().collect());
        }
    }
}

/// For each partition the runs ship (`SHIPPED`), in id order: its reveals and development
/// uses in this ledger, as `{"id", "reveals", "uses"}`.
fn consultation_counts(conn: &rusqlite::Connection, runs: &[i64]) -> Result<Vec<Value>> {
    let mut st = conn
        .prepare(&format!(
            "WITH {SHIPPED}
             SELECT p.id,
                    (SELECT count(*) FROM reveals r WHERE r.partition_id = p.id),
                    (SELECT count(*) FROM uses u WHERE u.partition_id = p.id)
             FROM shipped p
             ORDER BY p.id"
        ))
        .map_err(sql_err("pack"))?;
    st.query_map([json!(runs).to_string()], |r| {
        Ok(json!({"id": r.get::<_, String>(0)?, "reveals": r.get::<_, i64>(1)?, "uses": r.get::<_, i64>(2)?}))
    })
    .and_then(|rows| rows.collect())
    .map_err(sql_err("pack"))
}

impl Ledger {
    /// The chained entries of `runs`, with their reveals and notes, in chain order, as a bundle
    /// (unsigned: `signing` signs it). Every run with a reveal or a development use of a
    /// partition the bundle ships comes too, with a run over each partition consulted
    /// (`closure`); `partitions` counts those consultations, and the seals of those
    /// partitions come along. A merged entry keeps the hashes it came with, so it is known again
    /// wherever it has been merged before. Returns the bundle and the runs it carries.
    pub fn pack(&self, runs: &[i64], created_at: &str) -> Result<(Value, Vec<i64>)> {
        let runs = closure(&self.conn, runs)?;
        let counts = consultation_counts(&self.conn, &runs)?;
        let mut st = self
            .conn
            .prepare(&format!(
                "WITH {SHIPPED}
                 SELECT seq, kind, ref_id, coalesce(origin_prev, prev_hash), coalesce(origin, entry_hash) FROM chain WHERE
                   (kind = 'run' AND ref_id IN chosen)
                   OR (kind = 'reveal' AND ref_id IN (SELECT id FROM reveals WHERE run_id IN chosen))
                   OR (kind = 'note' AND ref_id IN (SELECT id FROM notes WHERE run_id IN chosen))
                   OR (kind = 'seal' AND ref_id IN (SELECT id FROM seals WHERE partition_id IN shipped))
                 ORDER BY seq"
            ))
            .map_err(sql_err("pack"))?;
        let ids = json!(&runs).to_string();
        let links: Vec<(i64, String, i64, String, String)> = st
            .query_map([&ids], |r| {
                Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?))
            })
            .and_then(|rows| rows.collect())
            .map_err(sql_err("pack"))?;
        let mut entries = Vec::new();
        for (seq, kind, id, prev, hash) in links {
            let mut sections = Vec::new();
            for (name, sql) in section_queries(&kind) {
                let mut st = self.conn.prepare(sql).map_err(sql_err("pack"))?;
                let columns: Vec<String> = st.column_names().map(str::to_string).collect();
                let n = columns.len();
                let rows: Vec<Vec<Sql>> = st
                    .query_map([id], |r| (0..n).map(|c| r.get::<_, Sql>(c)).collect())
                    .and_then(|rows| rows.collect())
                    .map_err(sql_err("pack"))?;
                sections.push(json!({"name": name, "columns": columns, "rows": rows.iter().map(|r| r.iter().map(encode).collect::<Vec<_>>()).collect::<Vec<_>>()}));
            }
            // Reveals and notes name their run by its entry hash: ids differ between ledgers.
            let run_entry: Option<String> = match kind.as_str() {
                "run" | "seal" => None,
                other => {
                    let table = if other == "reveal" {
                        "reveals"
                    } else {
                        "notes"
                    };
                    self.conn
                        .query_row(
                            &format!("SELECT coalesce(c.origin, c.entry_hash) FROM chain c JOIN {table} t ON c.kind = 'run' AND c.ref_id = t.run_id WHERE t.id = ?1"),
                            [id],
                            |r| r.get(0),
                        )
                        .optional()
                        .map_err(sql_err("pack"))?
                }
            };
            entries.push(json!({"seq": seq, "kind": kind, "id": id, "prev_hash": prev, "entry_hash": hash, "run_entry": run_entry, "sections": sections}));
        }
        Ok((
            json!({"format": FORMAT, "created_at": created_at, "entries": entries, "partitions": counts}),
            runs,
        ))
    }

    /// Merge a bundle: check its signature against the keys this ledger trusts (an unsigned
    /// bundle, or one signed with another key, only with `allow_unverified`), verify every
    /// entry's hash and the signed counts of each shipped partition's consultations, skip
    /// entries already present, refuse a fork (exit 4), and append the rest (with new local
    /// ids) in one transaction, with a record of the merge (`merges`) that each merged entry
    /// names.
    pub fn merge(
        &mut self,
        bundle: &Value,
        allow_unverified: bool,
        who: &crate::guard::consult::Who,
    ) -> Result<Merged> {
        if bundle["format"] != FORMAT {
            return Err(Error::Input(format!(
                "not a probity bundle (format {}); make one with `probity pack`",
                bundle["format"]
            )));
        }
        let signer = self.signer(bundle)?;
        match (&signer, allow_unverified) {
            (Signer::Trusted { .. }, _) | (_, true) => {}
            (Signer::Untrusted { name, key }, false) => {
                if let Some(other) = self.trusted_key_of(name)? {
                    return Err(Error::Integrity(format!(
                        "the bundle is signed in the name of {name:?}, but with key {key}, and this ledger trusts {name:?} with another key ({other}): someone else may be using their name; nothing was merged. Ask {name:?}, by another channel than the bundle, which key is theirs (`probity key show`); merge with --allow-unverified only if you know who made it, which is recorded"
                    )));
                }
                return Err(Error::Integrity(format!(
                    "the bundle is signed by {name:?} with key {key}, which this ledger does not trust; nothing was merged. If that key is theirs (ask them for `probity key show`), trust it with `probity key trust {} {key}`; or merge with --allow-unverified, which is recorded",
                    shell_word(name)
                )));
            }
            (Signer::Unsigned, false) => {
                return Err(Error::Integrity(
                    "the bundle is not signed, so nothing says who made it; nothing was merged. Ask its sender to pack it with a signing key (`probity key new`), or merge with --allow-unverified, which is recorded".into(),
                ));
            }
        }
        let entries = bundle["entries"]
            .as_array()
            .ok_or_else(|| Error::Input("the bundle has no entries".into()))?;
        // 1. Every entry must hash to what it claims before anything is written.
        let mut parsed = Vec::new();
        for (i, e) in entries.iter().enumerate() {
            let bad = || Error::Integrity(format!("bundle entry {} is malformed", i + 1));
            let kind = e["kind"].as_str().ok_or_else(bad)?.to_string();
            if !super::chain::KINDS.contains(&kind.as_str()) {
                return Err(Error::Integrity(format!(
                    "bundle entry {} is of kind {kind:?}, not one of {}: it was not packed by this version of probity, or it was edited; nothing was merged",
                    i + 1,
                    super::chain::KINDS.join(", ")
                )));
            }
            let prev = e["prev_hash"].as_str().ok_or_else(bad)?.to_string();
            let claimed = e["entry_hash"].as_str().ok_or_else(bad)?.to_string();
            let mut sections: Sections = Vec::new();
            let mut columns: Vec<Vec<String>> = Vec::new();
            for s in e["sections"].as_array().ok_or_else(bad)? {
                let name = s["name"].as_str().ok_or_else(bad)?.to_string();
                let cols: Vec<String> = s["columns"]
                    .as_array()
                    .ok_or_else(bad)?
                    .iter()
                    .map(|c| c.as_str().map(str::to_string))
                    .collect::<Option<_>>()
                    .ok_or_else(bad)?;
                let rows: Vec<Vec<Sql>> = s["rows"]
                    .as_array()
                    .ok_or_else(bad)?
                    .iter()
                    .map(|r| {
                        r.as_array()
                            .and_then(|vals| vals.iter().map(decode).collect::<Option<Vec<Sql>>>())
                    })
                    .collect::<Option<_>>()
                    .ok_or_else(bad)?;
                sections.push((name, rows));
                columns.push(cols);
            }
            // The entry's sections in order; a sparse one may be absent (a bundle packed
            // before it existed), which hashes as empty.
            let mut at = 0;
            for (name, _) in section_queries(&kind) {
                if sections.get(at).is_some_and(|s| s.0 == *name) {
                    at += 1;
                } else if !super::chain::sparse(name) {
                    return Err(bad());
                }
            }
            if at != sections.len() {
                return Err(bad());
            }
            // Every section's columns are the schema's own, in order: values are stored under
            // the names they were hashed beside, and no name from a bundle reaches SQL.
            for ((name, rows), cols) in sections.iter().zip(&columns) {
                for row in rows {
                    for (c, v) in cols.iter().zip(row) {
                        let limit = if name == "notes" && c == "text" {
                            super::NOTE_MAX_BYTES
                        } else {
                            TEXT_MAX_BYTES
                        };
                        if let Sql::Text(t) = v
                            && t.len() > limit
                        {
                            return Err(Error::Input(format!(
                                "bundle entry {} ({kind}): a {name}.{c} text of {} bytes, more than the {limit} a ledger keeps; nothing was merged",
                                i + 1,
                                t.len()
                            )));
                        }
                    }
                }
                let schema = self.section_columns(&kind, name)?;
                if *cols != schema || rows.iter().any(|r| r.len() != schema.len()) {
                    return Err(Error::Input(format!(
                        "bundle entry {} ({kind}): its {name} section has the columns [{}], not this ledger's [{}]; it was not packed by this version of probity, or it was edited; nothing was merged",
                        i + 1,
                        cols.join(", "),
                        schema.join(", ")
                    )));
                }
            }
            for ((name, rows), cols) in sections.iter().zip(&columns) {
                for row in rows {
                    for (c, v) in cols.iter().zip(row) {
                        if let Some(why) = unreadable(name, c, v) {
                            return Err(Error::Integrity(format!(
                                "bundle entry {} ({kind}): its {name}.{c} {why}; it was not packed by probity, or it was edited; nothing was merged",
                                i + 1
                            )));
                        }
                    }
                }
            }
            let computed = entry_hash(&prev, &sections);
            if computed != claimed {
                return Err(Error::Integrity(format!(
                    "bundle entry {} ({kind} {}) was altered: it claims {claimed} but its content hashes to {computed}; nothing was merged",
                    i + 1,
                    e["id"]
                )));
            }
            parsed.push((
                kind,
                prev,
                claimed,
                e["run_entry"].as_str().map(str::to_string),
                sections,
                columns,
            ));
        }
        // 1b. The signed counts: every reveal and development use of each shipped partition in
        // the sender's ledger travels in the bundle, none left out.
        check_counts(bundle, &parsed, !matches!(signer, Signer::Unsigned))?;
        // 2. A partition both hold must be stored alike: each run's entry hashes its partition,
        // so a merged run over a partition stored otherwise here (its rows identified by
        // another version, say) could never verify.
        for (_, _, _, _, sections, columns) in &parsed {
            for ((name, rows), cols) in sections.iter().zip(columns) {
                if name != "partitions" {
                    continue;
                }
                for row in rows {
                    self.same_partition(cols, row)?;
                }
            }
        }
        // 3. A reveal is stored under the partition it counts against: this ledger must hold
        // it, or a run in the bundle bring it (in any order: references are checked at the
        // commit, since a reveal through a partition can precede the first run over it).
        let mut brought = std::collections::BTreeSet::new();
        for (_, _, _, _, sections, columns) in &parsed {
            for ((name, rows), cols) in sections.iter().zip(columns) {
                if let Some(at) = cols.iter().position(|c| c == "id")
                    && name == "partitions"
                {
                    brought.extend(rows.iter().filter_map(|r| match r.get(at) {
                        Some(Sql::Text(t)) => Some(t.clone()),
                        _ => None,
                    }));
                }
            }
        }
        for (i, (kind, _, hash, _, sections, columns)) in parsed.iter().enumerate() {
            for ((name, rows), cols) in sections.iter().zip(columns) {
                let Some(at) = cols.iter().position(|c| c == "partition_id") else {
                    continue;
                };
                if name != "reveals" {
                    continue;
                }
                for row in rows {
                    let Some(Sql::Text(p)) = row.get(at) else {
                        continue;
                    };
                    if !brought.contains(p) && !self.holds_partition(p)? {
                        return Err(Error::Input(format!(
                            "bundle entry {} ({kind} {hash}) counts against partition {p}, which neither the bundle nor this ledger holds (no run over it came with the bundle); nothing was merged. Merge a bundle with a run over partition {p} first (its sender's `probity history` lists the runs), then this one",
                            i + 1
                        )));
                    }
                }
            }
        }
        let path = self.path.clone();
        let fail = |e: rusqlite::Error| migrate::refuse_or_fail(&path, e, "merge");
        let tx = self
            .conn
            .transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)
            .map_err(fail)?;
        // References are checked when the merge commits (SQLite resets this at its end).
        tx.pragma_update(None, "defer_foreign_keys", "ON")
            .map_err(fail)?;
        let (key, name, trusted_as) = match &signer {
            Signer::Trusted {
                name,
                key,
                trusted_as,
            } => (Some(key), Some(name), Some(trusted_as)),
            Signer::Untrusted { name, key } => (Some(key), Some(name), None),
            Signer::Unsigned => (None, None, None),
        };
        tx.execute(
            "INSERT INTO merges (merged_at, user, host, tool_version, bundle_created_at, signer, public_key, verdict, trusted_as, merged, skipped) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, 0, 0)",
            rusqlite::params![who.at, who.user, who.host, who.tool_version, bundle["created_at"].as_str().unwrap_or(""), name, key, signer.verdict(), trusted_as],
        )
        .map_err(fail)?;
        let merge_id = tx.last_insert_rowid();
        // A partition this ledger sealed at a run's start, with nothing about it chained yet,
        // keeps the rules it has followed since: its seal is chained before anything merged.
        let mut named = std::collections::BTreeSet::new();
        for (_, _, _, _, sections, columns) in &parsed {
            for ((name, rows), cols) in sections.iter().zip(columns) {
                for (c, col) in cols.iter().enumerate() {
                    if col == "partition_id" || (name == "partitions" && col == "id") {
                        named.extend(rows.iter().filter_map(|r| match r.get(c) {
                            Some(Sql::Text(t)) => Some(t.clone()),
                            _ => None,
                        }));
                    }
                }
            }
        }
        for p in &named {
            let mark = super::SealMark {
                at: &who.at,
                user: &who.user,
                host: &who.host,
            };
            super::settle_seal(&tx, p, None, &mark)?;
        }
        let (mut merged, mut skipped) = (0, 0);
        for (kind, prev, hash, run_entry, sections, columns) in parsed {
            let present: bool = tx
                .query_row(
                    "SELECT EXISTS (SELECT 1 FROM chain WHERE entry_hash = ?1 OR origin = ?1)",
                    [&hash],
                    |r| r.get(0),
                )
                .map_err(fail)?;
            if present {
                skipped += 1;
                continue;
            }
            // Two different entries continuing the same entry: two histories. Every ledger
            // starts from the genesis hash, so that shared start is no conflict.
            let rival: Option<String> = if prev == super::chain::GENESIS {
                None
            } else {
                tx
                .query_row(
                    "SELECT coalesce(origin, entry_hash) FROM chain WHERE (origin_prev = ?1) OR (origin IS NULL AND prev_hash = ?1) LIMIT 1",
                    [&prev],
                    |r| r.get(0),
                )
                .optional()
                .map_err(fail)?
            };
            if let Some(r) = rival {
                return Err(Error::Integrity(format!(
                    "the bundle's {kind} entry {hash} continues entry {prev}, which this ledger already continues with {r}: the two ledgers hold different histories (a copied ledger used separately, or a rewritten one); nothing was merged"
                )));
            }
            let local_run = match &run_entry {
                None => None,
                Some(h) => Some(
                    tx.query_row("SELECT ref_id FROM chain WHERE kind = 'run' AND (entry_hash = ?1 OR origin = ?1)", [h], |r| r.get::<_, i64>(0))
                        .optional()
                        .map_err(fail)?
                        .ok_or_else(|| Error::Input(format!("the bundle's {kind} {hash} belongs to a run that is neither in the bundle nor in this ledger; pack its run too")))?,
                ),
            };
            let n = merged + skipped + 1;
            let unfit = |e: rusqlite::Error| match migrate::refuse_or_fail(&path, e, "merge") {
                Error::Ledger { source, .. } => Error::Integrity(format!(
                    "bundle entry {n} ({kind} {hash}) does not fit this ledger ({source}); nothing was merged"
                )),
                other => other,
            };
            let new_id = insert_entry(&tx, &kind, local_run, &sections, &columns).map_err(unfit)?;
            read_back(&tx, &kind, new_id, local_run, &sections, &columns, n, &hash)?;
            let local = super::chain::append(&tx, &kind, new_id, Some((&hash, &prev)))?;
            tx.execute(
                "UPDATE chain SET merge_id = ?1 WHERE entry_hash = ?2",
                rusqlite::params![merge_id, local],
            )
            .map_err(fail)?;
            merged += 1;
        }
        tx.execute(
            "UPDATE merges SET merged = ?1, skipped = ?2 WHERE id = ?3",
            rusqlite::params![merged as i64, skipped as i64, merge_id],
        )
        .map_err(fail)?;
        tx.commit().map_err(|e| match e.sqlite_error() {
            Some(f) if f.extended_code == rusqlite::ffi::SQLITE_CONSTRAINT_FOREIGNKEY => {
                Error::Integrity(
                    "the bundle's rows refer to rows that neither the bundle nor this ledger holds: it was not packed by probity, or it was edited; nothing was merged".into(),
                )
            }
            _ => fail(e),
        })?;
        Ok(Merged {
            merged,
            skipped,
            signer,
        })
    }

    /// The bundle's signer, its signature checked (exit 4 when it does not match).
    fn signer(&self, bundle: &Value) -> Result<Signer> {
        let sig = &bundle["signature"];
        if sig.is_null() {
            return Ok(Signer::Unsigned);
        }
        let bad = |why: &str| {
            Error::Integrity(format!(
                "the bundle's signature {why}: it was changed after it was signed, or not made by probity; nothing was merged"
            ))
        };
        let (Some(name), Some(key), Some(hex)) = (
            sig["signer"].as_str(),
            sig["public_key"].as_str(),
            sig["signature"].as_str(),
        ) else {
            return Err(bad("is incomplete"));
        };
        let key = crate::signing::public_key(key).map_err(|e| bad(&e))?;
        let message = crate::signing::signed_message(bundle, name, &key)
            .ok_or_else(|| bad("covers a bundle that lacks its entries or counts"))?;
        crate::signing::verify(&key, &message, hex)
            .map_err(|e| bad(&format!("by {name:?} (key {key}) fails: {e}")))?;
        // A name is printed on this terminal: one that could carry escape codes is refused,
        // whether or not the signature holds.
        if let Some(why) = crate::signing::name_problem(name) {
            return Err(Error::Integrity(format!(
                "the bundle's signer name {name:?} {why}: the signature may be valid, but no key names its owner that way (`probity key new` refuses such names); nothing was merged"
            )));
        }
        Ok(match self.trusted_name(&key)? {
            Some(trusted_as) => Signer::Trusted {
                name: name.to_string(),
                key,
                trusted_as,
            },
            None => Signer::Untrusted {
                name: name.to_string(),
                key,
            },
        })
    }

    /// Whether this ledger stores partition `id`.
    fn holds_partition(&self, id: &str) -> Result<bool> {
        self.conn
            .query_row(
                "SELECT EXISTS (SELECT 1 FROM partitions WHERE id = ?1)",
                [id],
                |r| r.get(0),
            )
            .map_err(sql_err("merge"))
    }

    /// The name this ledger trusts `key` under, if it does.
    pub fn trusted_name(&self, key: &str) -> Result<Option<String>> {
        self.conn
            .query_row(
                "SELECT name FROM trusted_keys WHERE public_key = ?1",
                [key],
                |r| r.get(0),
            )
            .optional()
            .map_err(sql_err("read trusted keys"))
    }

    /// A key this ledger trusts under `name`, if any (the first by key, should an older
    /// ledger hold two).
    pub fn trusted_key_of(&self, name: &str) -> Result<Option<String>> {
        self.conn
            .query_row(
                "SELECT public_key FROM trusted_keys WHERE name = ?1 ORDER BY public_key LIMIT 1",
                [name],
                |r| r.get(0),
            )
            .optional()
            .map_err(sql_err("read trusted keys"))
    }

    /// Trust `key` to sign bundles as `name`; refused (exit 2) when the key is trusted already,
    /// or the name is trusted with another key.
    pub fn trust(&mut self, key: &str, name: &str, at: &str, by: &str) -> Result<()> {
        let key = crate::signing::public_key(key).map_err(Error::Input)?;
        if let Some(why) = crate::signing::name_problem(name) {
            return Err(Error::Input(format!(
                "the name {name:?} {why}; choose a name of printable characters"
            )));
        }
        if let Some(n) = self.trusted_name(&key)? {
            return Err(Error::Input(format!(
                "key {key} is trusted already, as {n:?}"
            )));
        }
        // One name, one key: a second key under a trusted name would let its holder sign as
        // that person.
        if let Some(other) = self.trusted_key_of(name)? {
            return Err(Error::Input(format!(
                "{name:?} is trusted already, with key {other}: a name is trusted with one key only, so that a bundle's name says whose key signed it; trust this key under another name (for example {:?})",
                format!("{name}-2")
            )));
        }
        let path = self.path.clone();
        self.conn
            .execute(
                "INSERT INTO trusted_keys (public_key, name, added_at, added_by) VALUES (?1, ?2, ?3, ?4)",
                rusqlite::params![key, name, at, by],
            )
            .map_err(|e| migrate::refuse_or_fail(&path, e, "trust a key"))?;
        Ok(())
    }

    /// The keys this ledger trusts: (public key, name, added at, added by), by name then key.
    pub fn trusted_keys(&self) -> Result<Vec<(String, String, String, String)>> {
        let mut st = self
            .conn
            .prepare("SELECT public_key, name, added_at, added_by FROM trusted_keys ORDER BY name, public_key")
            .map_err(sql_err("read trusted keys"))?;
        st.query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?)))
            .and_then(|rows| rows.collect())
            .map_err(sql_err("read trusted keys"))
    }

    /// Every merge, oldest first, as JSON objects (for `audit`).
    pub fn merges(&self) -> Result<Vec<Value>> {
        let mut st = self
            .conn
            .prepare("SELECT id, merged_at, user, host, bundle_created_at, signer, public_key, verdict, trusted_as, merged, skipped FROM merges ORDER BY id")
            .map_err(sql_err("read merges"))?;
        st.query_map([], |r| {
            Ok(json!({
                "merge": r.get::<_, i64>(0)?,
                "merged_at": r.get::<_, String>(1)?,
                "user": r.get::<_, String>(2)?,
                "host": r.get::<_, String>(3)?,
                "bundle_created_at": r.get::<_, String>(4)?,
                "signer": r.get::<_, Option<String>>(5)?,
                "public_key": r.get::<_, Option<String>>(6)?,
                "verdict": r.get::<_, String>(7)?,
                "trusted_as": r.get::<_, Option<String>>(8)?,
                "entries_merged": r.get::<_, i64>(9)?,
                "entries_skipped": r.get::<_, i64>(10)?,
            }))
        })
        .and_then(|rows| rows.collect())
        .map_err(sql_err("read merges"))
    }
}

impl Ledger {
    /// The columns of an entry section in this ledger's schema, in order.
    fn section_columns(&self, kind: &str, section: &str) -> Result<Vec<String>> {
        let sql = section_queries(kind)
            .iter()
            .find(|(n, _)| *n == section)
            .map(|(_, q)| *q)
            .ok_or_else(|| {
                Error::Input(format!(
                    "a bundle section {section} is not part of a {kind} entry"
                ))
            })?;
        let st = self.conn.prepare(sql).map_err(sql_err("merge"))?;
        Ok(st.column_names().map(str::to_string).collect())
    }

    /// Refuse a bundle's partition row (its columns by name) that this ledger stores otherwise.
    fn same_partition(&self, cols: &[String], row: &[Sql]) -> Result<()> {
        let at = |c: &str| cols.iter().position(|x| x == c).and_then(|i| row.get(i));
        let Some(Sql::Text(id)) = at("id") else {
            return Err(Error::Integrity("a bundled partition has no id".into()));
        };
        let mut st = self
            .conn
            .prepare("SELECT * FROM partitions WHERE id = ?1")
            .map_err(sql_err("merge"))?;
        let names: Vec<String> = st.column_names().map(str::to_string).collect();
        let stored: Option<Vec<Sql>> = st
            .query_row([id], |r| {
                (0..names.len()).map(|i| r.get::<_, Sql>(i)).collect()
            })
            .optional()
            .map_err(sql_err("merge"))?;
        let Some(stored) = stored else {
            return Ok(());
        };
        let differs = names
            .iter()
            .zip(&stored)
            .any(|(c, v)| at(c).is_none_or(|b| b != v));
        if differs {
            let version = |settings: Option<&Sql>| match settings {
                Some(Sql::Text(s)) => super::settings_identity(s),
                _ => 0,
            };
            let here = version(
                names
                    .iter()
                    .position(|c| c == "settings")
                    .and_then(|i| stored.get(i)),
            );
            let there = version(at("settings"));
            return Err(Error::Integrity(format!(
                "the bundle's partition {id} is stored differently in this ledger{}: runs over it could not be verified here; nothing was merged (merge it into a ledger that does not hold this partition)",
                if here != there {
                    format!(
                        " (its rows identified by version {here} here, version {there} in the bundle)"
                    )
                } else {
                    String::new()
                }
            )));
        }
        Ok(())
    }
}

/// A name as one shell word, for a command line the user may copy. A name that is not
/// printable (merge refuses those before this) is written with escapes (`$'...'`), so no
/// control character reaches the terminal.
fn shell_word(name: &str) -> String {
    if !name.is_empty()
        && name
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || "-_.@".contains(c))
    {
        name.to_string()
    } else if name.chars().any(crate::signing::unprintable) {
        let mut out = String::from("$'");
        for c in name.chars() {
            match c {
                '\\' | '\'' => {
                    out.push('\\');
                    out.push(c);
                }
                c if crate::signing::unprintable(c) => {
                    out += &match u32::from(c) {
                        n @ 0..=0x7f => format!("\\x{n:02x}"),
                        n @ 0x80..=0xffff => format!("\\u{n:04x}"),
                        n => format!("\\U{n:08x}"),
                    }
                }
                c => out.push(c),
            }
        }
        out + "'"
    } else {
        format!("'{}'", name.replace('\'', "'\\''"))
    }
}

type Parsed = (
    String,
    String,
    String,
    Option<String>,
    Sections,
    Vec<Vec<String>>,
);

/// Compare the consultations a bundle carries with the counts it states for each partition
/// it ships or consults (required when `signed`): a reveal or development use left out, or
/// added, or carried for a partition with no stated count, is an integrity failure (exit 4).
fn check_counts(bundle: &Value, parsed: &[Parsed], signed: bool) -> Result<()> {
    let Some(stated) = bundle["partitions"].as_array() else {
        if signed {
            return Err(Error::Integrity(
                "the signed bundle states no counts of its partitions' reveals; nothing was merged"
                    .into(),
            ));
        }
        return Ok(());
    };
    let mut carried: std::collections::BTreeMap<String, (u64, u64)> = Default::default();
    let mut shipped: std::collections::BTreeSet<String> = Default::default();
    for (_, _, _, _, sections, columns) in parsed {
        for ((name, rows), cols) in sections.iter().zip(columns) {
            let column = match name.as_str() {
                "reveals" | "uses" => "partition_id",
                "partitions" => "id",
                _ => continue,
            };
            let Some(at) = cols.iter().position(|c| c == column) else {
                continue;
            };
            for row in rows {
                let Some(Sql::Text(p)) = row.get(at) else {
                    continue;
                };
                match name.as_str() {
                    "reveals" => carried.entry(p.clone()).or_default().0 += 1,
                    "uses" => carried.entry(p.clone()).or_default().1 += 1,
                    _ => {
                        shipped.insert(p.clone());
                    }
                }
            }
        }
    }
    let bad = || {
        Error::Integrity("the bundle's partition counts are malformed; nothing was merged".into())
    };
    let mut counted = std::collections::BTreeSet::new();
    for p in stated {
        let id = p["id"].as_str().ok_or_else(bad)?;
        let want = (
            p["reveals"].as_u64().ok_or_else(bad)?,
            p["uses"].as_u64().ok_or_else(bad)?,
        );
        let have = carried.get(id).copied().unwrap_or_default();
        if have != want {
            return Err(Error::Integrity(format!(
                "partition {id}: the bundle carries {} reveal(s) and {} development use(s), but states that its sender's ledger holds {} and {}: consultations were left out or added after packing; nothing was merged",
                have.0, have.1, want.0, want.1
            )));
        }
        counted.insert(id.to_string());
    }
    if let Some(p) = shipped.iter().find(|p| !counted.contains(*p)) {
        return Err(Error::Integrity(format!(
            "the bundle ships partition {p} but states no count of its reveals; nothing was merged"
        )));
    }
    // A reveal or use counted against a partition the bundle states nothing about (a reveal of
    // another partition's test rows, a run developing on them): the sender's other
    // consultations of that partition could be left out unseen.
    if let Some((p, (r, u))) = carried.iter().find(|(p, _)| !counted.contains(*p)) {
        return Err(Error::Integrity(format!(
            "the bundle carries {r} reveal(s) and {u} development use(s) of partition {p} but states no count of that partition's consultations, so others could have been left out; nothing was merged (it was packed by an older probity, or edited: ask its sender to pack it again)"
        )));
    }
    Ok(())
}

/// Why a bundled value could not be read back later as the ledger reads that column (the
/// columns that hold JSON or a spec), or `None`. A forged value that hashes cleanly would
/// otherwise be stored and fail only when a later command reads it.
fn unreadable(section: &str, column: &str, v: &Sql) -> Option<String> {
    let json = matches!(
        (section, column),
        ("partitions", "settings")
            | ("candidates", "params")
            | ("reveals", "mechanism" | "optimism")
            | ("nested", "selections")
            | ("replays", "differences")
            | ("run_identities", "recipe")
    );
    let text = match v {
        Sql::Text(t) => t,
        _ if json
            || matches!(
                (section, column),
                ("runs", "model_json" | "spec_text") | ("seals", "rules")
            ) =>
        {
            return Some("is not text".into());
        }
        _ => return None,
    };
    if json {
        return serde_json::from_str::<Value>(text)
            .err()
            .map(|e| format!("is not JSON ({e})"));
    }
    match (section, column) {
        ("runs", "model_json") => serde_json::from_str::<crate::runner::StoredModel>(text)
            .err()
            .map(|e| format!("is not a stored model ({e})")),
        ("runs", "spec_text") => toml::from_str::<toml::Table>(text)
            .err()
            .map(|e| format!("is not TOML ({})", e.message().trim())),
        ("seals", "rules") => serde_json::from_str::<Value>(text)
            .ok()
            .and_then(|v| crate::spec::GuardSpec::from_json(&v))
            .is_none()
            .then(|| "is not a partition's [guard] rules".into()),
        _ => None,
    }
}

/// The sections a partition brings, stored once for every run over it.
fn shared(section: &str) -> bool {
    matches!(
        section,
        "partitions" | "partition_rows" | "partition_identities"
    )
}

/// A bundled row as this ledger stores it: the entry's own id fresh (`new_id`), the run it
/// belongs to by its local id, and links into the other ledger's id space cleared. `None` for
/// a row that is not kept (a replay's result names a run of the other ledger).
fn local_row(
    kind: &str,
    new_id: i64,
    local_run: Option<i64>,
    section: &str,
    cols: &[String],
    row: &[Sql],
) -> Option<Vec<Sql>> {
    if section == "replays" {
        return None;
    }
    Some(
        cols.iter()
            .zip(row)
            .map(|(c, v)| match (section, c.as_str()) {
                ("runs", "id") | ("reveals", "id") | ("notes", "id") | ("seals", "id") => {
                    Sql::Integer(new_id)
                }
                (_, "run_id") if kind == "run" => Sql::Integer(new_id),
                (_, "run_id") => Sql::Integer(local_run.unwrap_or(0)),
                (_, "reveal_id") => Sql::Integer(new_id),
                // A replay's original is linked only when it is in this ledger under the same id space.
                ("runs", "replay_of") => Sql::Null,
                _ => v.clone(),
            })
            .collect(),
    )
}

/// Insert one entry's rows with fresh local ids; returns the new main id. Column names are the
/// schema's (checked equal to the bundle's before anything is written). A partition this
/// ledger already holds is not written again: `read_back` then requires it to be the same.
fn insert_entry(
    tx: &rusqlite::Transaction,
    kind: &str,
    local_run: Option<i64>,
    sections: &Sections,
    columns: &[Vec<String>],
) -> rusqlite::Result<i64> {
    let mut new_id = 0i64;
    // Parents first: a run's partition before the run, the run before its scores.
    let mut order: Vec<usize> = (0..sections.len()).collect();
    order.sort_by_key(|&i| match sections[i].0.as_str() {
        "partitions" => 0,
        "partition_rows" => 1,
        "runs" | "reveals" | "notes" | "seals" => 2,
        _ => 3,
    });
    let mut known_partition = false;
    for i in order {
        let ((name, rows), cols) = (&sections[i], &columns[i]);
        if name == "partitions"
            && let Some(Some(Sql::Text(id))) = rows.first().map(|r| r.first())
        {
            known_partition = tx.query_row(
                "SELECT EXISTS (SELECT 1 FROM partitions WHERE id = ?1)",
                [id],
                |r| r.get(0),
            )?;
        }
        if shared(name) && known_partition {
            continue;
        }
        for row in rows {
            let Some(vals) = local_row(kind, new_id, local_run, name, cols, row) else {
                continue;
            };
            let main = matches!(
                (kind, name.as_str()),
                ("run", "runs") | ("reveal", "reveals") | ("note", "notes") | ("seal", "seals")
            );
            // The main row takes a fresh id; the rest keep every column.
            let (names, vals): (Vec<&String>, Vec<Sql>) = cols
                .iter()
                .zip(vals)
                .filter(|(c, _)| !(main && c.as_str() == "id"))
                .unzip();
            let sql = format!(
                "INSERT INTO {name} ({}) VALUES ({})",
                names
                    .iter()
                    .map(|c| c.as_str())
                    .collect::<Vec<_>>()
                    .join(", "),
                (1..=names.len())
                    .map(|i| format!("?{i}"))
                    .collect::<Vec<_>>()
                    .join(", ")
            );
            tx.execute(&sql, rusqlite::params_from_iter(vals.iter()))?;
            if main {
                new_id = tx.last_insert_rowid();
            }
        }
    }
    Ok(new_id)
}

/// Read a merged entry back from the ledger and require every section to hold exactly the
/// bundle's rows (as `local_row` stores them): nothing dropped, coerced or merged into rows the
/// ledger already held. A partition this ledger held before must be the bundle's, row for row.
#[allow(clippy::too_many_arguments)]
fn read_back(
    tx: &rusqlite::Transaction,
    kind: &str,
    new_id: i64,
    local_run: Option<i64>,
    sections: &Sections,
    columns: &[Vec<String>],
    n: usize,
    hash: &str,
) -> Result<()> {
    let stored = super::chain::sections(tx, kind, new_id)?.ok_or_else(|| {
        Error::Integrity(format!(
            "bundle entry {n} ({kind} {hash}) was not stored whole; nothing was merged"
        ))
    })?;
    for (name, rows) in &stored {
        let expected: Vec<Vec<Sql>> = sections
            .iter()
            .zip(columns)
            .find(|((s, _), _)| s == name)
            .map(|((_, r), cols)| {
                r.iter()
                    .filter_map(|row| local_row(kind, new_id, local_run, name, cols, row))
                    .collect()
            })
            .unwrap_or_default();
        if *rows != expected {
            let why = if shared(name) {
                "this ledger holds that partition with other content"
            } else {
                "the stored rows differ from the bundle's"
            };
            return Err(Error::Integrity(format!(
                "bundle entry {n} ({kind} {hash}): its {name} section conflicts with this ledger ({why}); nothing was merged"
            )));
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::shell_word;

    #[test]
    fn shell_words_quote_and_escape() {
        assert_eq!(shell_word("ada"), "ada");
        assert_eq!(shell_word("Ada L"), "'Ada L'");
        assert_eq!(shell_word("o'hara"), "'o'\\''hara'");
        assert_eq!(shell_word("a\u{1b}[2J'"), "$'a\\x1b[2J\\''");
        assert_eq!(shell_word("a\u{202e}b"), "$'a\\u202eb'");
        assert!(!shell_word("x\u{9b}\n").chars().any(char::is_control));
    }
}
