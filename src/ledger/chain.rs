//! The tamper-evident chain. Every entry (a run with everything stored under it, a reveal with
//! its scores, a note, a partition's seal) gets entry_hash = SHA-256(prev_hash || canonical bytes), prev_hash being
//! the previous entry's hash as 64 hex characters (64 zeros for the first).
//!
//! Canonical bytes: for each section of the entry, in a fixed order, the section name, then each
//! row in primary-key order, each column in table order, each value type-tagged and
//! length-prefixed (integers as decimal text, reals as the 16 hex digits of their IEEE-754 bits,
//! text as UTF-8, blobs as bytes). The same rows always give the same bytes, wherever they came
//! from (this ledger, or a bundle being merged).

use crate::error::{Error, Result};
use rusqlite::types::Value as Sql;
use rusqlite::{Connection, OptionalExtension, params};
use sha2::{Digest, Sha256};

pub const GENESIS: &str = "0000000000000000000000000000000000000000000000000000000000000000";

/// An entry's content: (section name, rows).
pub type Sections = Vec<(String, Vec<Vec<Sql>>)>;

/// The kinds of chained entries.
pub const KINDS: [&str; 4] = ["run", "reveal", "note", "seal"];

/// The queries that make up each kind of entry, in order; `?1` is the entry's id.
pub fn section_queries(kind: &str) -> &'static [(&'static str, &'static str)] {
    match kind {
        "run" => &[
            ("runs", "SELECT * FROM runs WHERE id = ?1"),
            (
                "partitions",
                "SELECT * FROM partitions WHERE id = (SELECT partition_id FROM runs WHERE id = ?1)",
            ),
            (
                "partition_rows",
                "SELECT * FROM partition_rows WHERE partition_id = (SELECT partition_id FROM runs WHERE id = ?1) ORDER BY row_key",
            ),
            (
                "folds",
                "SELECT * FROM folds WHERE run_id = ?1 ORDER BY repeat, fold",
            ),
            (
                "candidates",
                "SELECT * FROM candidates WHERE run_id = ?1 ORDER BY id",
            ),
            (
                "fold_scores",
                "SELECT * FROM fold_scores WHERE run_id = ?1 ORDER BY candidate, repeat, fold, part, metric",
            ),
            (
                "scores",
                "SELECT * FROM scores WHERE run_id = ?1 ORDER BY candidate, part, metric",
            ),
            (
                "warnings",
                "SELECT * FROM warnings WHERE run_id = ?1 ORDER BY seq",
            ),
            ("nested", "SELECT * FROM nested WHERE run_id = ?1"),
            ("replays", "SELECT * FROM replays WHERE run_id = ?1"),
            (
                "run_inputs",
                "SELECT * FROM run_inputs WHERE run_id = ?1 ORDER BY path",
            ),
            (
                "uses",
                "SELECT * FROM uses WHERE run_id = ?1 ORDER BY partition_id",
            ),
            (
                "partition_identities",
                "SELECT * FROM partition_identities WHERE partition_id = (SELECT partition_id FROM runs WHERE id = ?1)",
            ),
            (
                "run_identities",
                "SELECT * FROM run_identities WHERE run_id = ?1",
            ),
        ],
        "reveal" => &[
            ("reveals", "SELECT * FROM reveals WHERE id = ?1"),
            (
                "reveal_scores",
                "SELECT * FROM reveal_scores WHERE reveal_id = ?1 ORDER BY metric",
            ),
        ],
        "note" => &[("notes", "SELECT * FROM notes WHERE id = ?1")],
        "seal" => &[("seals", "SELECT * FROM seals WHERE id = ?1")],
        _ => &[],
    }
}

/// Sections added after entries were first chained: hashed only when they hold rows, so every
/// entry written before them keeps its hash (and an empty one adds nothing).
pub fn sparse(section: &str) -> bool {
    matches!(section, "uses" | "partition_identities" | "run_identities")
}

fn sql_err(context: &'static str) -> impl FnOnce(rusqlite::Error) -> Error {
    move |e| Error::Ledger {
        context: context.to_string(),
        source: e,
    }
}

/// Read an entry's sections; `None` when its main row is gone.
pub fn sections(conn: &Connection, kind: &str, id: i64) -> Result<Option<Sections>> {
    let mut out = Vec::new();
    for (i, (name, sql)) in section_queries(kind).iter().enumerate() {
        let mut st = conn.prepare(sql).map_err(sql_err("read entry"))?;
        let n = st.column_count();
        let rows: Vec<Vec<Sql>> = st
            .query_map([id], |r| (0..n).map(|c| r.get::<_, Sql>(c)).collect())
            .and_then(|rows| rows.collect())
            .map_err(sql_err("read entry"))?;
        if i == 0 && rows.is_empty() {
            return Ok(None);
        }
        out.push((name.to_string(), rows));
    }
    Ok(Some(out))
}

fn put(h: &mut Sha256, tag: u8, bytes: &[u8]) {
    h.update([tag]);
    h.update((bytes.len() as u64).to_le_bytes());
    h.update(bytes);
}

/// One value's canonical bytes.
fn put_value(h: &mut Sha256, v: rusqlite::types::ValueRef<'_>) {
    use rusqlite::types::ValueRef as V;
    match v {
        V::Null => put(h, b'n', b""),
        V::Integer(i) => {
            // Decimal text, written without an allocation (values are hashed by the million).
            let mut buf = [0u8; 20];
            let mut at = buf.len();
            let mut u = i.unsigned_abs();
            loop {
                at -= 1;
                buf[at] = b'0' + (u % 10) as u8;
                u /= 10;
                if u == 0 {
                    break;
                }
            }
            if i < 0 {
                let mut signed = [0u8; 21];
                signed[0] = b'-';
                let len = buf.len() - at;
                signed[1..=len].copy_from_slice(&buf[at..]);
                put(h, b'i', &signed[..=len]);
            } else {
                put(h, b'i', &buf[at..]);
            }
        }
        V::Real(f) => {
            const HEX: &[u8; 16] = b"0123456789abcdef";
            let bits = f.to_bits();
            let mut buf = [0u8; 16];
            for (k, b) in buf.iter_mut().enumerate() {
                *b = HEX[((bits >> (60 - 4 * k)) & 0xf) as usize];
            }
            put(h, b'r', &buf);
        }
        V::Text(t) => put(h, b't', t),
        V::Blob(b) => put(h, b'b', b),
    }
}

/// The canonical bytes of an entry, fed straight into a hasher.
fn feed(h: &mut Sha256, sections: &Sections) {
    for (name, rows) in sections {
        if rows.is_empty() && sparse(name) {
            continue;
        }
        put(h, b'S', name.as_bytes());
        for row in rows {
            put(h, b'R', &(row.len() as u64).to_le_bytes());
            for v in row {
                put_value(h, v.into());
            }
        }
    }
}

/// The hash of an entry read straight from the ledger, row by row (a run's sections can hold
/// hundreds of thousands of rows; nothing is collected). `None` when its main row is gone.
fn stream_hash(
    conn: &Connection,
    prev: &str,
    kind: &str,
    id: i64,
    known: Option<&Known>,
) -> Result<Option<String>> {
    let mut h = Sha256::new();
    h.update(prev.as_bytes());
    for (i, (name, sql)) in section_queries(kind).iter().enumerate() {
        // A sparse section's name goes in with its first row, if any.
        let mut header = !sparse(name);
        if header {
            put(&mut h, b'S', name.as_bytes());
        }
        if let Some((_, rows)) = known.and_then(|k| k.partition.iter().find(|(n, _)| n == name)) {
            if !header && !rows.keys.is_empty() {
                put(&mut h, b'S', name.as_bytes());
            }
            rows.feed(&mut h);
            continue;
        }
        if let Some((_, rows)) = known
            .and_then(|k| k.sections.iter().find(|(n, _)| n == name))
            .filter(|_| i > 0)
        {
            rows(&mut RowSink { h: &mut h });
            continue;
        }
        let mut st = conn.prepare(sql).map_err(sql_err("read entry"))?;
        let n = st.column_count();
        let mut rows = st.query([id]).map_err(sql_err("read entry"))?;
        let mut any = false;
        while let Some(r) = rows.next().map_err(sql_err("read entry"))? {
            any = true;
            if !header {
                put(&mut h, b'S', name.as_bytes());
                header = true;
            }
            put(&mut h, b'R', &(n as u64).to_le_bytes());
            for c in 0..n {
                put_value(&mut h, r.get_ref(c).map_err(sql_err("read entry"))?);
            }
        }
        if i == 0 && !any {
            return Ok(None);
        }
    }
    Ok(Some(crate::spec::hex(&h.finalize())))
}

/// A partition's test-row identities as this process stored them, so a run's entry can hash
/// them without reading them back (a million-row run stores 200,000; reading them back was
/// most of its chain time). Only for a partition this transaction, or this connection's
/// previous one, inserted as new: its rows are then exactly these identities, once each, and
/// nothing else changes a stored partition. `audit` recomputes every entry from the stored
/// rows, so a difference would still show.
pub struct PartitionRows<'a> {
    pub id: &'a str,
    /// In key order.
    pub keys: &'a [[u8; 16]],
}

impl PartitionRows<'_> {
    /// The section's rows as `SELECT * ... ORDER BY row_key` gives them: (partition_id TEXT,
    /// row_key BLOB), a repeated identity stored once.
    fn feed(&self, h: &mut Sha256) {
        let mut last: Option<&[u8; 16]> = None;
        for k in self.keys {
            if last == Some(k) {
                continue;
            }
            last = Some(k);
            put(h, b'R', &2u64.to_le_bytes());
            put_value(h, rusqlite::types::ValueRef::Text(self.id.as_bytes()));
            put_value(h, rusqlite::types::ValueRef::Blob(k));
        }
    }
}

/// What a run's writer hands the chain from memory instead of letting it read the rows back:
/// only rows this transaction wrote, so they are exactly what `SELECT *` would give. `audit`
/// recomputes every entry from the stored rows, so a difference would still show.
#[derive(Default)]
pub struct Known<'a> {
    /// A fresh partition's `partition_rows` section (by section name).
    pub partition: Vec<(&'static str, PartitionRows<'a>)>,
    /// (section name, a function that gives the section's rows to the sink in the section's
    /// order). Never the entry's first section (whose absence means a missing entry).
    pub sections: Vec<(&'static str, RowsFn<'a>)>,
}

/// Gives a section's rows, one `RowSink::row` call each.
pub type RowsFn<'a> = &'a dyn Fn(&mut RowSink);

/// Where `Known` sections put their rows.
pub struct RowSink<'h> {
    h: &'h mut Sha256,
}

impl RowSink<'_> {
    /// One row, its values in table column order.
    pub fn row(&mut self, values: &[rusqlite::types::ValueRef<'_>]) {
        put(self.h, b'R', &(values.len() as u64).to_le_bytes());
        for v in values {
            put_value(self.h, *v);
        }
    }
}

/// A REAL bound with `sqlite3_bind_double` as SQLite gives it back: NaN is stored as NULL, and
/// a REAL with an integer value is stored as that integer and read back as a REAL, so -0.0
/// comes back as 0.0. Every other value comes back with its bits.
pub fn stored_real(v: Option<f64>) -> rusqlite::types::ValueRef<'static> {
    use rusqlite::types::ValueRef as V;
    match v {
        None => V::Null,
        Some(x) if x.is_nan() => V::Null,
        // Both zeros are equal to 0.0: either comes back as +0.0.
        Some(x) => V::Real(if x == 0.0 { 0.0 } else { x }),
    }
}

/// SHA-256(prev_hash || canonical bytes), hex.
pub fn entry_hash(prev: &str, sections: &Sections) -> String {
    let mut h = Sha256::new();
    h.update(prev.as_bytes());
    feed(&mut h, sections);
    crate::spec::hex(&h.finalize())
}

/// The chain's last hash (the genesis hash when empty).
pub fn head(conn: &Connection) -> Result<String> {
    Ok(conn
        .query_row(
            "SELECT entry_hash FROM chain ORDER BY seq DESC LIMIT 1",
            [],
            |r| r.get(0),
        )
        .optional()
        .map_err(sql_err("read chain head"))?
        .unwrap_or_else(|| GENESIS.to_string()))
}

/// Link an entry (already written in this transaction) onto the chain; returns its hash.
pub fn append(
    conn: &Connection,
    kind: &str,
    id: i64,
    origin: Option<(&str, &str)>,
) -> Result<String> {
    append_known(conn, kind, id, origin, None)
}

/// `append`, with some of a run's sections taken from `known` (see `Known`).
pub fn append_known(
    conn: &Connection,
    kind: &str,
    id: i64,
    origin: Option<(&str, &str)>,
    known: Option<&Known>,
) -> Result<String> {
    let prev = head(conn)?;
    let hash = stream_hash(conn, &prev, kind, id, known)?
        .ok_or_else(|| Error::Internal(format!("{kind} {id} vanished before it was chained")))?;
    conn.execute(
        "INSERT INTO chain (kind, ref_id, prev_hash, entry_hash, origin, origin_prev) VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
        params![kind, id, prev, hash, origin.map(|o| o.0), origin.map(|o| o.1)],
    )
    .map_err(sql_err("append to chain"))?;
    Ok(hash)
}

/// Chain every run, reveal and note that has no entry yet, in id order (runs, then reveals,
/// then notes); used once, when a ledger first gets a chain.
pub fn adopt(conn: &Connection) -> Result<()> {
    for (kind, table) in [("run", "runs"), ("reveal", "reveals"), ("note", "notes")] {
        let mut st = conn
            .prepare(&format!("SELECT id FROM {table} WHERE id NOT IN (SELECT ref_id FROM chain WHERE kind = ?1) ORDER BY id"))
            .map_err(sql_err("adopt entries"))?;
        let ids: Vec<i64> = st
            .query_map([kind], |r| r.get(0))
            .and_then(|rows| rows.collect())
            .map_err(sql_err("adopt entries"))?;
        for id in ids {
            append(conn, kind, id, None)?;
        }
    }
    Ok(())
}

/// One problem found by `verify`.
#[derive(Debug, Clone, PartialEq)]
pub struct Break {
    /// Chain position (1-based), when the problem is on the chain.
    pub seq: Option<i64>,
    pub kind: String,
    pub id: i64,
    pub what: String,
}

/// Recompute the chain from the stored rows. Returns every break found, in chain order, then
/// entries that exist without a chain link.
pub fn verify(conn: &Connection) -> Result<(usize, Vec<Break>)> {
    let mut st = conn
        .prepare("SELECT seq, kind, ref_id, prev_hash, entry_hash FROM chain ORDER BY seq")
        .map_err(sql_err("read chain"))?;
    let links: Vec<(i64, String, i64, String, String)> = st
        .query_map([], |r| {
            Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?))
        })
        .and_then(|rows| rows.collect())
        .map_err(sql_err("read chain"))?;
    let mut breaks = Vec::new();
    let mut expected_prev = GENESIS.to_string();
    for (seq, kind, id, prev, stored) in &links {
        if *prev != expected_prev {
            breaks.push(Break {
                seq: Some(*seq),
                kind: kind.clone(),
                id: *id,
                what: format!("links to previous hash {prev} but the entry before it has {expected_prev} (entries removed or reordered)"),
            });
        }
        match stream_hash(conn, prev, kind, *id, None)? {
            None => breaks.push(Break {
                seq: Some(*seq),
                kind: kind.clone(),
                id: *id,
                what: format!("{kind} {id} is missing (deleted)"),
            }),
            Some(computed) => {
                if computed != *stored {
                    breaks.push(Break {
                        seq: Some(*seq),
                        kind: kind.clone(),
                        id: *id,
                        what: format!("content changed: the chain expects {stored}, the stored rows hash to {computed}"),
                    });
                }
            }
        }
        expected_prev = stored.clone();
    }
    for (kind, table) in [
        ("run", "runs"),
        ("reveal", "reveals"),
        ("note", "notes"),
        ("seal", "seals"),
    ] {
        let mut st = conn
            .prepare(&format!("SELECT id FROM {table} WHERE id NOT IN (SELECT ref_id FROM chain WHERE kind = ?1) ORDER BY id"))
            .map_err(sql_err("check unchained entries"))?;
        let ids: Vec<i64> = st
            .query_map([kind], |r| r.get(0))
            .and_then(|rows| rows.collect())
            .map_err(sql_err("check unchained entries"))?;
        for id in ids {
            breaks.push(Break {
                seq: None,
                kind: kind.to_string(),
                id,
                what: format!("{kind} {id} is not on the chain (inserted outside probity)"),
            });
        }
    }
    Ok((links.len(), breaks))
}

#[cfg(test)]
mod tests {

    /// The allocation-free encodings equal the plain ones the chain was defined with.
    #[test]
    fn value_bytes_match_their_definition() {
        use rusqlite::types::ValueRef as V;
        for i in [0i64, 7, -7, 10, 1234567890123, i64::MIN, i64::MAX] {
            let mut a = Sha256::new();
            put_value(&mut a, V::Integer(i));
            let mut b = Sha256::new();
            put(&mut b, b'i', i.to_string().as_bytes());
            assert_eq!(a.finalize(), b.finalize(), "{i}");
        }
        for f in [0.0f64, -0.0, 1.5, -3.25e-300, f64::MAX, f64::MIN_POSITIVE] {
            let mut a = Sha256::new();
            put_value(&mut a, V::Real(f));
            let mut b = Sha256::new();
            put(&mut b, b'r', format!("{:016x}", f.to_bits()).as_bytes());
            assert_eq!(a.finalize(), b.finalize(), "{f}");
        }
    }

    use super::*;

    /// FIPS 180-4 example (NIST CSRC, "SHA256.pdf" example values): SHA-256("abc").
    #[test]
    fn sha256_matches_the_fips_180_4_example() {
        assert_eq!(
            crate::spec::hex(&Sha256::digest(b"abc")),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
        // FIPS 180-4 two-block example.
        assert_eq!(
            crate::spec::hex(&Sha256::digest(
                b"abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq"
            )),
            "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1"
        );
    }

    #[test]
    fn the_encoding_separates_types_and_boundaries() {
        let a: Sections = vec![("x".into(), vec![vec![Sql::Text("12".into())]])];
        let b: Sections = vec![("x".into(), vec![vec![Sql::Integer(12)]])];
        let c: Sections = vec![(
            "x".into(),
            vec![vec![Sql::Text("1".into()), Sql::Text("2".into())]],
        )];
        let (ha, hb, hc) = (
            entry_hash(GENESIS, &a),
            entry_hash(GENESIS, &b),
            entry_hash(GENESIS, &c),
        );
        assert!(ha != hb && ha != hc && hb != hc);
        assert_eq!(ha, entry_hash(GENESIS, &a.clone()));
        let r1: Sections = vec![("x".into(), vec![vec![Sql::Real(0.1)]])];
        let r2: Sections = vec![(
            "x".into(),
            vec![vec![Sql::Real("0.1000000000000000000001".parse().unwrap())]],
        )];
        let r3: Sections = vec![(
            "x".into(),
            vec![vec![Sql::Real(f64::from_bits(0.1f64.to_bits() + 1))]],
        )];
        assert_eq!(
            entry_hash(GENESIS, &r1),
            entry_hash(GENESIS, &r2),
            "same double, same bytes"
        );
        assert_ne!(
            entry_hash(GENESIS, &r1),
            entry_hash(GENESIS, &r3),
            "one ulp apart, different bytes"
        );
    }
}
