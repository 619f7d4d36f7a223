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

impl Ledger {
    /// The chained entries of `runs` (with their reveals and notes), in chain order, as a bundle.
    pub fn pack(&self, runs: &[i64], created_at: &str) -> Result<Value> {
        let mut st = self
            .conn
            .prepare(
                "SELECT seq, kind, ref_id, prev_hash, entry_hash FROM chain WHERE
                   (kind = 'run' AND ref_id IN (SELECT value FROM json_each(?1)))
                   OR (kind = 'reveal' AND ref_id IN (SELECT id FROM reveals WHERE run_id IN (SELECT value FROM json_each(?1))))
                   OR (kind = 'note' AND ref_id IN (SELECT id FROM notes WHERE run_id IN (SELECT value FROM json_each(?1))))
                 ORDER BY seq",
            )
            .map_err(sql_err("pack"))?;
        let ids = json!(runs).to_string();
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
                "run" => None,
                other => {
                    let table = if other == "reveal" {
                        "reveals"
                    } else {
                        "notes"
                    };
                    self.conn
                        .query_row(
                            &format!("SELECT c.entry_hash FROM chain c JOIN {table} t ON c.kind = 'run' AND c.ref_id = t.run_id WHERE t.id = ?1"),
                            [id],
                            |r| r.get(0),
                        )
                        .optional()
                        .map_err(sql_err("pack"))?
                }
            };
            entries.push(json!({"seq": seq, "kind": kind, "id": id, "prev_hash": prev, "entry_hash": hash, "run_entry": run_entry, "sections": sections}));
        }
        Ok(json!({"format": FORMAT, "created_at": created_at, "entries": entries}))
    }

    /// Merge a bundle: verify every entry's hash, skip entries already present, refuse a fork
    /// (exit 4), and append the rest (with new local ids) in one transaction. Returns
    /// (merged, skipped).
    pub fn merge(&mut self, bundle: &Value) -> Result<(usize, usize)> {
        if bundle["format"] != FORMAT {
            return Err(Error::Input(format!(
                "not a probity bundle (format {}); make one with `probity pack`",
                bundle["format"]
            )));
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
        let path = self.path.clone();
        let fail = |e: rusqlite::Error| migrate::refuse_or_fail(&path, e, "merge");
        let tx = self
            .conn
            .transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)
            .map_err(fail)?;
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
            super::chain::append(&tx, &kind, new_id, Some((&hash, &prev)))?;
            merged += 1;
        }
        tx.commit().map_err(fail)?;
        Ok((merged, skipped))
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
        _ if json || matches!((section, column), ("runs", "model_json" | "spec_text")) => {
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
                ("runs", "id") | ("reveals", "id") | ("notes", "id") => Sql::Integer(new_id),
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
        "runs" | "reveals" | "notes" => 2,
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
                ("run", "runs") | ("reveal", "reveals") | ("note", "notes")
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
