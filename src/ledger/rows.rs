//! Row identities in the ledger: what a partition stores of its rows (its test rows' feature,
//! labelled and key identities, its development rows' labelled and key identities), and which
//! rows of a table are rows of stored partitions, each partition compared the way it
//! identifies its own rows (its identity version and, from version 3 on, its recipe: the
//! feature columns and the key).
//!
//! Version 3 compares a table's rows with a partition's test rows:
//! - by key, when the table has the partition's key column (found by its name);
//! - rows that carry their target (a run's, or a file to predict that has the target column):
//!   by labelled identity, features and target together, so a record that only looks alike
//!   to a model is not taken for the sealed one;
//! - rows to predict: also by feature identity, for each partition whose recipe holds every
//!   feature of the predicting model, since the model then gives such a row exactly the
//!   prediction it gives the sealed row.
//!
//! Another file's records can agree with a sealed row by chance, more so when a partition's
//! rows are told apart by few or coarse cells (one feature and a target of three digits, say).
//! So a run's rows from another file count as a partition's sealed rows by labelled identity
//! only when more of them match than chance explains (`beyond_chance`); a key match, a
//! prediction, and the same file (compared by position) need no such margin.

use super::sql_err;
use crate::data::identity::{Recipe, feature_ids, key_ids, labelled_ids};
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

/// A row's (feature, labelled) identities.
type Pair = (RowKey, RowKey);

/// The stored sets of a partition's test-row identities.
#[derive(Debug, Clone, Copy)]
pub enum Set {
    /// `partition_rows`: feature identities (versions 1 and 2: whole-row identities).
    Rows,
    /// `partition_labels`: labelled identities.
    Labels,
    /// `partition_keys`: key identities.
    Keys,
}

impl Set {
    /// The table and its identity column.
    fn table(self) -> (&'static str, &'static str) {
        match self {
            Set::Rows => ("partition_rows", "row_key"),
            Set::Labels => ("partition_labels", "label_id"),
            Set::Keys => ("partition_keys", "key_id"),
        }
    }
}

/// Some rows of a table, identified in every way the stored partitions need, each way once.
pub struct TableIds<'a> {
    table: &'a Table,
    rows: &'a [usize],
    /// The caller's key column, for whole-row identities (versions 1 and 2).
    key: Option<usize>,
    /// The target column, when the rows carry their targets.
    target: Option<usize>,
    /// The features of the model whose predictions are made, when predicting.
    model: Option<Vec<String>>,
    /// Whether labelled matches must exceed chance (a run's rows from another file).
    chance: bool,
    threads: usize,
    /// Per recipe's columns: (feature, labelled) identities, or `None` when the table lacks a
    /// column.
    features: Vec<(Vec<String>, Option<Vec<Pair>>)>,
    keys: Vec<(usize, Vec<Option<RowKey>>)>,
    legacy: Vec<(Legacy, Vec<RowKey>)>,
}

impl<'a> TableIds<'a> {
    /// `rows` of `table`; `key` as for whole-row identities; `target` when the rows carry their
    /// targets; `model` (feature names) when their predictions are made. Without a model the
    /// rows are a run's, from another file than the partitions', and labelled matches must
    /// exceed chance.
    pub fn new(
        table: &'a Table,
        rows: &'a [usize],
        key: Option<usize>,
        target: Option<usize>,
        model: Option<Vec<String>>,
    ) -> Self {
        TableIds {
            table,
            rows,
            key,
            target,
            chance: model.is_none(),
            model,
            threads: crate::data::all_cores(),
            features: Vec::new(),
            keys: Vec::new(),
            legacy: Vec::new(),
        }
    }

    /// The rows' (feature, labelled) identities under `recipe`; `None` when the table lacks
    /// a column. Without a target the labelled half repeats the feature identity (unused).
    fn under(&mut self, recipe: &Recipe) -> Option<&[Pair]> {
        let at = match self
            .features
            .iter()
            .position(|(c, _)| c.as_slice() == recipe.columns())
        {
            Some(at) => at,
            None => {
                let ids = match self.target {
                    Some(t) => labelled_ids(self.table, recipe, t, self.rows, self.threads),
                    None => feature_ids(self.table, recipe, self.rows, self.threads)
                        .map(|f| f.into_iter().map(|k| (k, k)).collect()),
                };
                self.features.push((recipe.columns().to_vec(), ids));
                self.features.len() - 1
            }
        };
        self.features[at].1.as_deref()
    }

    /// The rows' labelled identities under `recipe`, when they carry targets.
    fn labelled(&mut self, recipe: &Recipe) -> Option<Vec<Option<RowKey>>> {
        self.target?;
        Some(self.under(recipe)?.iter().map(|p| Some(p.1)).collect())
    }

    /// The rows' feature identities under `recipe`, when predicting with a model whose
    /// features the recipe holds (the model then predicts such a row as the sealed one).
    fn predicted(&mut self, recipe: &Recipe) -> Option<Vec<Option<RowKey>>> {
        let model = self.model.as_ref().filter(|m| !m.is_empty())?;
        if !model.iter().all(|f| recipe.columns().contains(f)) {
            return None;
        }
        Some(self.under(recipe)?.iter().map(|p| Some(p.0)).collect())
    }

    /// The rows' key identities from the column of the recipe's key name; `None` when the
    /// table has no such column.
    fn keys(&mut self, recipe: &Recipe) -> Option<&[Option<RowKey>]> {
        let col = recipe.key().and_then(|k| self.table.index_of(k))?;
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

/// Which of `ids` are stored in a partition's `set` (its primary key is (partition_id,
/// identity); `stored` is about how many rows it holds). One lookup per distinct identity when
/// they are few beside the stored rows, else one pass over them in identity order beside the
/// sorted identities; the answer is the same either way.
pub(super) fn members(
    conn: &Connection,
    set: Set,
    partition: &str,
    stored: i64,
    ids: &[Option<RowKey>],
) -> Result<Vec<bool>> {
    let (table, column) = set.table();
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
/// rows `ids` identifies) are its test rows, compared as the module documentation says.
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
        let mut mark = |m: Vec<bool>| hit.iter_mut().zip(m).for_each(|(h, m)| *h |= m);
        let member = |set: Set, ids: &[Option<RowKey>]| members(conn, set, &p.id, p.n_test, ids);
        match (p.identity.legacy(), &p.recipe) {
            (Some(v), _) => {
                let keys: Vec<Option<RowKey>> = ids.legacy(v).iter().copied().map(Some).collect();
                mark(member(Set::Rows, &keys)?);
            }
            (None, Some(recipe)) => {
                if let Some(k) = ids.keys(recipe) {
                    let k = k.to_vec();
                    mark(member(Set::Keys, &k)?);
                }
                if let Some(l) = ids.labelled(recipe) {
                    let m = member(Set::Labels, &l)?;
                    let found = m.iter().filter(|m| **m).count();
                    if !ids.chance || beyond_chance(found, &l, p.n_test) {
                        mark(m);
                    }
                }
                if let Some(f) = ids.predicted(recipe) {
                    mark(member(Set::Rows, &f)?);
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

/// Whether `found` of the rows whose identities are `ids` matching some of `stored` identities
/// is more than chance explains. Chance is judged by the rows themselves: the share of pairs
/// of them that share an identity, c, is the chance that two unrelated records agree; a row
/// then meets one of `stored` identities by chance with probability about min(1, c x stored),
/// so about E = n x that rows would. More than E + 3 sqrt(E) + 2 is beyond chance (a Poisson
/// bound of about three standard deviations, and at least three rows).
pub fn beyond_chance(found: usize, ids: &[Option<RowKey>], stored: i64) -> bool {
    let mut sorted: Vec<RowKey> = ids.iter().flatten().copied().collect();
    sorted.sort_unstable();
    let n = sorted.len() as f64;
    let shared: f64 = sorted
        .chunk_by(|a, b| a == b)
        .map(|g| {
            let k = g.len() as f64;
            k * (k - 1.0) / 2.0
        })
        .sum();
    let pairs = n * (n - 1.0) / 2.0;
    let c = if pairs > 0.0 { shared / pairs } else { 0.0 };
    let e = n * (c * stored as f64).min(1.0);
    found as f64 > e + 3.0 * e.sqrt() + 2.0
}

/// How many of the rows (which carry their targets) are development rows of a version-3
/// partition, by its stored labelled or key identities; `None` for an older partition, which
/// stores none.
pub fn developed(conn: &Connection, ids: &mut TableIds, p: &Stored) -> Result<Option<usize>> {
    let Some(recipe) = p.recipe.as_ref().filter(|_| p.identity == Identity::V3) else {
        return Ok(None);
    };
    let (labels, keys): (Option<Vec<u8>>, Option<Vec<u8>>) = match conn.query_row(
        "SELECT label_ids, key_ids FROM partition_development WHERE partition_id = ?1",
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
    let (labels, keys) = (sorted(&labels), sorted(&keys));
    let mut hit = vec![false; ids.rows.len()];
    if let Some(l) = ids.labelled(recipe) {
        let m: Vec<bool> = l
            .iter()
            .map(|k| k.is_some_and(|k| labels.binary_search(&k).is_ok()))
            .collect();
        let found = m.iter().filter(|m| **m).count();
        if beyond_chance(found, &l, labels.len() as i64) {
            hit.iter_mut().zip(m).for_each(|(h, m)| *h |= m);
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

/// Store a new version-3 partition's labelled and key identities and its development rows'.
pub fn insert_extras(
    tx: &Connection,
    partition: &str,
    ids: &crate::runner::Identities,
    keyed: bool,
) -> rusqlite::Result<()> {
    for (table, column, keys) in [
        ("partition_labels", "label_id", &ids.test_labels),
        ("partition_keys", "key_id", &ids.test_keys),
    ] {
        let mut st = tx.prepare(&format!(
            "INSERT OR IGNORE INTO {table} (partition_id, {column}) VALUES (?1, ?2)"
        ))?;
        for k in keys {
            st.execute(params![partition, &k[..]])?;
        }
    }
    let blob =
        |keys: &[RowKey]| -> Vec<u8> { keys.iter().flat_map(|k| k.iter().copied()).collect() };
    tx.execute(
        "INSERT OR IGNORE INTO partition_development (partition_id, label_ids, key_ids) VALUES (?1, ?2, ?3)",
        params![
            partition,
            blob(&ids.development),
            keyed.then(|| blob(&ids.development_keys))
        ],
    )?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn id(i: u32) -> Option<RowKey> {
        let mut k = [0u8; 16];
        k[..4].copy_from_slice(&i.to_le_bytes());
        Some(k)
    }

    /// Rows that are all told apart: chance explains no match, so three matches are beyond it
    /// and two are not (the margin of two rows). Rows of eight kinds only: every row meets a
    /// stored one by chance, so even all of them matching is not evidence.
    #[test]
    fn matches_count_only_beyond_what_chance_explains() {
        let distinct: Vec<Option<RowKey>> = (0..500).map(id).collect();
        assert!(!beyond_chance(2, &distinct, 100));
        assert!(beyond_chance(3, &distinct, 100));
        let coarse: Vec<Option<RowKey>> = (0..1000).map(|i| id(i % 8)).collect();
        // c = 8 x C(125, 2) / C(1000, 2) = 0.1241..., so E = 1000 x min(1, 0.99) = 993.
        assert!(!beyond_chance(1000, &coarse, 8));
        // Few duplicates among many rows: E = 1000 x (10 / 499500) x 50 = 1.0, and the bound
        // is 1 + 3 + 2 = 6.
        let mut few: Vec<Option<RowKey>> = (0..990).map(id).collect();
        few.extend((0..10).map(id));
        assert!(!beyond_chance(6, &few, 50));
        assert!(beyond_chance(7, &few, 50));
        assert!(!beyond_chance(0, &[], 10));
    }
}
