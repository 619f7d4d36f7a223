//! Row identities in the ledger: what a partition stores of its rows (its test rows' feature
//! and key identities, its development rows' identities), and which rows of a table are rows
//! of stored partitions, each partition compared the way it identifies its own rows (its
//! identity version and, from version 3 on, its recipe: the feature columns and the key).

use super::sql_err;
use crate::data::identity::{Recipe, feature_ids, key_ids};
use crate::data::{Identity, Legacy, RowKey, Table};
use crate::error::Result;
use rusqlite::{Connection, params};
use serde_json::Value;

/// A stored partition, as far as its rows' identities go.
#[derive(Debug, Clone)]
pub struct Stored {
    pub id: String,
    pub data_sha256: String,
    pub n_test: i64,
    pub identity: Identity,
    /// Version 3: the columns its identities read.
    pub recipe: Option<Recipe>,
}

/// Every stored partition `keep` keeps, by id. A partition of an identity version this probity
/// does not know is left out (it cannot be compared).
pub fn stored(conn: &Connection, keep: impl Fn(&Stored) -> bool) -> Result<Vec<Stored>> {
    let err = || sql_err("read partitions");
    let mut st = conn
        .prepare("SELECT id, data_sha256, n_test, settings FROM partitions ORDER BY id")
        .map_err(err())?;
    let rows: Vec<(String, String, i64, String)> = st
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?)))
        .and_then(|rows| rows.collect())
        .map_err(err())?;
    let mut out = Vec::new();
    for (id, data_sha256, n_test, settings) in rows {
        let v: Value = serde_json::from_str(&settings).unwrap_or(Value::Null);
        let Some(identity) = Identity::of_number(v["identity"].as_i64().unwrap_or(1)) else {
            continue;
        };
        let recipe = Recipe::from_json(&v["recipe"]);
        if identity == Identity::V3 && recipe.is_none() {
            continue;
        }
        let s = Stored {
            id,
            data_sha256,
            n_test,
            identity,
            recipe,
        };
        if keep(&s) {
            out.push(s);
        }
    }
    Ok(out)
}

/// Some rows of a table, identified in every way the stored partitions need, each way once.
pub struct TableIds<'a> {
    table: &'a Table,
    rows: &'a [usize],
    /// The caller's key column (the spec's or the model's key), if the table has it.
    key: Option<usize>,
    threads: usize,
    features: Vec<(Vec<String>, Option<Vec<RowKey>>)>,
    keys: Vec<(usize, Vec<Option<RowKey>>)>,
    legacy: Vec<(Legacy, Vec<RowKey>)>,
}

impl<'a> TableIds<'a> {
    pub fn new(table: &'a Table, rows: &'a [usize], key: Option<usize>, threads: usize) -> Self {
        TableIds {
            table,
            rows,
            key,
            threads,
            features: Vec::new(),
            keys: Vec::new(),
            legacy: Vec::new(),
        }
    }

    /// The rows' feature identities under `recipe`; `None` when the table lacks a column.
    fn features(&mut self, recipe: &Recipe) -> Option<&[RowKey]> {
        let at = match self
            .features
            .iter()
            .position(|(c, _)| c.as_slice() == recipe.columns())
        {
            Some(at) => at,
            None => {
                let ids = feature_ids(self.table, recipe, self.rows, self.threads);
                self.features.push((recipe.columns().to_vec(), ids));
                self.features.len() - 1
            }
        };
        self.features[at].1.as_deref()
    }

    /// The rows' key identities: from the caller's key column, else the column the recipe
    /// names; `None` when the table has neither.
    fn keys(&mut self, recipe: &Recipe) -> Option<&[Option<RowKey>]> {
        let col = self
            .key
            .or_else(|| recipe.key().and_then(|k| self.table.index_of(k)))?;
        let at = match self.keys.iter().position(|(c, _)| *c == col) {
            Some(at) => at,
            None => {
                let ids = key_ids(self.table, col, self.rows, self.threads);
                self.keys.push((col, ids));
                self.keys.len() - 1
            }
        };
        Some(&self.keys[at].1)
    }

    /// The rows' whole-row identities (versions 1 and 2), with the caller's key.
    fn legacy(&mut self, v: Legacy) -> &[RowKey] {
        let at = match self.legacy.iter().position(|(l, _)| *l == v) {
            Some(at) => at,
            None => {
                let ids = crate::data::row_keys(self.table, self.key, self.rows, self.threads, v);
                self.legacy.push((v, ids));
                self.legacy.len() - 1
            }
        };
        &self.legacy[at].1
    }
}

/// Lookups by identity cost more than a step of a scan, by about this factor.
pub const PROBE_COST: i64 = 16;

/// Which of `ids` are stored for `partition` in `table.column` (its primary key is
/// (partition_id, column)). One lookup per distinct identity when they are few beside the
/// partition's `stored` rows, else one pass over its rows in identity order beside the sorted
/// identities; the answer is the same either way.
pub(super) fn members(
    conn: &Connection,
    table: &str,
    column: &str,
    partition: &str,
    stored: i64,
    ids: &[Option<RowKey>],
) -> Result<Vec<bool>> {
    let err = || sql_err("find sealed rows");
    let mut distinct: Vec<RowKey> = ids.iter().flatten().copied().collect();
    distinct.sort_unstable();
    distinct.dedup();
    let mut found = vec![false; distinct.len()];
    if (distinct.len() as i64).saturating_mul(PROBE_COST) < stored {
        let mut probe = conn
            .prepare_cached(&format!(
                "SELECT EXISTS (SELECT 1 FROM {table} WHERE partition_id = ?1 AND {column} = ?2)"
            ))
            .map_err(err())?;
        for (k, f) in distinct.iter().zip(found.iter_mut()) {
            *f = probe
                .query_row(params![partition, &k[..]], |r| r.get(0))
                .map_err(err())?;
        }
    } else {
        let mut scan = conn
            .prepare_cached(&format!(
                "SELECT {column} FROM {table} WHERE partition_id = ?1 ORDER BY {column}"
            ))
            .map_err(err())?;
        let mut rows = scan.query([partition]).map_err(err())?;
        let mut at = 0;
        while let Some(row) = rows.next().map_err(err())? {
            let Ok(stored) = row.get_ref(0).map_err(err())?.as_blob() else {
                continue;
            };
            while at < distinct.len() && distinct[at][..] < *stored {
                at += 1;
            }
            if at < distinct.len() && distinct[at][..] == *stored {
                found[at] = true;
            }
        }
    }
    Ok(ids
        .iter()
        .map(|k| k.is_some_and(|k| distinct.binary_search(&k).is_ok_and(|i| found[i])))
        .collect())
}

/// For each partition of `parts` that holds any of the rows: which rows (positions into the
/// rows `ids` identifies) are its test rows. Version 3: by feature identity under its recipe
/// (when the table has those columns) or by key identity; versions 1 and 2: by whole-row
/// identity with the caller's key.
pub fn sealed_rows(
    conn: &Connection,
    ids: &mut TableIds,
    parts: &[Stored],
) -> Result<Vec<(String, Vec<usize>)>> {
    let mut out = Vec::new();
    if ids.rows.is_empty() {
        return Ok(out);
    }
    for p in parts.iter().filter(|p| p.n_test > 0) {
        let mut hit = vec![false; ids.rows.len()];
        match (p.identity.legacy(), &p.recipe) {
            (Some(v), _) => {
                let keys: Vec<Option<RowKey>> = ids.legacy(v).iter().copied().map(Some).collect();
                let m = members(conn, "partition_rows", "row_key", &p.id, p.n_test, &keys)?;
                hit.iter_mut().zip(m).for_each(|(h, m)| *h |= m);
            }
            (None, Some(recipe)) => {
                if let Some(f) = ids.features(recipe) {
                    let f: Vec<Option<RowKey>> = f.iter().copied().map(Some).collect();
                    let m = members(conn, "partition_rows", "row_key", &p.id, p.n_test, &f)?;
                    hit.iter_mut().zip(m).for_each(|(h, m)| *h |= m);
                }
                if recipe.key().is_some()
                    && let Some(k) = ids.keys(recipe)
                {
                    let k = k.to_vec();
                    let m = members(conn, "partition_keys", "key_id", &p.id, p.n_test, &k)?;
                    hit.iter_mut().zip(m).for_each(|(h, m)| *h |= m);
                }
            }
            (None, None) => {}
        }
        let rows: Vec<usize> = (0..hit.len()).filter(|&i| hit[i]).collect();
        if !rows.is_empty() {
            out.push((p.id.clone(), rows));
        }
    }
    Ok(out)
}

/// How many of the rows are development rows of a version-3 partition (its stored development
/// identities, by feature or by key); `None` for an older partition, which stores none.
pub fn developed(conn: &Connection, ids: &mut TableIds, p: &Stored) -> Result<Option<usize>> {
    let Some(recipe) = p.recipe.as_ref().filter(|_| p.identity == Identity::V3) else {
        return Ok(None);
    };
    let (rows, keys): (Option<Vec<u8>>, Option<Vec<u8>>) = match conn.query_row(
        "SELECT row_ids, key_ids FROM partition_development WHERE partition_id = ?1",
        [&p.id],
        |r| Ok((r.get(0)?, r.get(1)?)),
    ) {
        Ok(v) => v,
        Err(rusqlite::Error::QueryReturnedNoRows) => return Ok(None),
        Err(e) => return Err(sql_err("read development identities")(e)),
    };
    let sorted = |blob: &Option<Vec<u8>>| -> Vec<RowKey> {
        blob.as_deref()
            .unwrap_or_default()
            .chunks_exact(16)
            .filter_map(|c| RowKey::try_from(c).ok())
            .collect()
    };
    let (rows, keys) = (sorted(&rows), sorted(&keys));
    let mut hit = vec![false; ids.rows.len()];
    if let Some(f) = ids.features(recipe) {
        for (h, k) in hit.iter_mut().zip(f) {
            *h |= rows.binary_search(k).is_ok();
        }
    }
    if !keys.is_empty()
        && let Some(k) = ids.keys(recipe)
    {
        for (h, k) in hit.iter_mut().zip(k) {
            *h |= k.is_some_and(|k| keys.binary_search(&k).is_ok());
        }
    }
    Ok(Some(hit.iter().filter(|h| **h).count()))
}

/// Store a new version-3 partition's key identities and its development rows' identities.
pub fn insert_extras(
    tx: &Connection,
    partition: &str,
    ids: &crate::runner::Identities,
    keyed: bool,
) -> rusqlite::Result<()> {
    let mut st =
        tx.prepare("INSERT OR IGNORE INTO partition_keys (partition_id, key_id) VALUES (?1, ?2)")?;
    for k in &ids.test_keys {
        st.execute(params![partition, &k[..]])?;
    }
    let blob =
        |keys: &[RowKey]| -> Vec<u8> { keys.iter().flat_map(|k| k.iter().copied()).collect() };
    tx.execute(
        "INSERT OR IGNORE INTO partition_development (partition_id, row_ids, key_ids) VALUES (?1, ?2, ?3)",
        params![
            partition,
            blob(&ids.development),
            keyed.then(|| blob(&ids.development_keys))
        ],
    )?;
    Ok(())
}
