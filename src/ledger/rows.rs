//! Row identities in the ledger: what a partition stores of its rows, and which rows of a
//! table are rows of stored partitions, each partition compared the way it identifies its own
//! rows (its identity version and, from version 3 on, its recipe: feature columns and key).
//!
//! A version-3 partition stores (`src/data/identity.rs` defines the identities):
//! - `partition_rows`: its test rows' feature identities, one row each (looked up by index);
//! - `partition_identities`: its test rows' labelled and key identities, and its development
//!   rows' labelled and key fingerprints, as sorted blobs;
//! - `run_identities`, for a run whose features differ from its partition's recipe: the test
//!   rows' feature identities under the run's own recipe, so its model's predictions are
//!   checked on the features it reads.
//!
//! The same data file is compared by row position, elsewhere. Another file:
//! - a run's rows (which carry their targets) by labelled identity, but only when the file is
//!   *related* to the partition: more of its rows match by content than chance explains
//!   (`beyond_chance`, judged by how often the partition's own rows share an identity). A bay
//!   whose climate and yield agree with one trial plot's is not taken for it; a copy of the
//!   partition's data is, whatever else was done to it;
//! - rows to predict by feature identity: exactly (every row counts) for a partition whose
//!   recipe holds every feature of the predicting model, since the model then predicts such a
//!   row as it predicts the sealed row; beyond chance otherwise; and a model's own run's
//!   identities exactly;
//! - either, by key: the key decides alone, whatever the cells now say, in a file of the same
//!   kind of records (`TableIds::kin`: the partition's key column and two of its feature
//!   columns, or its only one, by name), in a related file, and for a coarse partition (one
//!   whose test rows repeat each other's cells: there, where the key can be read, only the
//!   key decides; where it cannot, content beyond chance, which very coarse cells never
//!   reach). Two unrelated files that share a key column numbered from 1 and one feature name
//!   (of two or more) are not taken for each other.
//!
//! Rows to predict in a partition's own data file are also its test rows by position.

use super::sql_err;
use crate::data::identity::{
    Recipe, feature_ids, fingerprints, key_fingerprints, key_ids, labelled_ids,
};
use crate::data::{Identity, Legacy, RowKey, Table};
use crate::error::Result;
use rusqlite::{Connection, OptionalExtension, params};
use serde_json::Value;

/// A stored partition, as far as its rows' identities go.
#[derive(Debug, Clone)]
pub struct Stored {
    pub id: String,
    pub data_sha256: String,
    pub n_test: i64,
    /// Its development rows (train and validation).
    pub n_dev: i64,
    pub identity: Identity,
    /// Version 3: the columns its identities read.
    pub recipe: Option<Recipe>,
}

/// Every stored partition `keep` keeps, by id. A partition of an identity version this probity
/// does not know is left out (it cannot be compared).
pub fn stored(conn: &Connection, keep: impl Fn(&Stored) -> bool) -> Result<Vec<Stored>> {
    let err = || sql_err("read partitions");
    let mut st = conn
        .prepare(
            "SELECT id, data_sha256, n_test, n_train + n_validation, settings FROM partitions ORDER BY id",
        )
        .map_err(err())?;
    let rows: Vec<(String, String, i64, i64, String)> = st
        .query_map([], |r| {
            Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?))
        })
        .and_then(|rows| rows.collect())
        .map_err(err())?;
    let mut out = Vec::new();
    for (id, data_sha256, n_test, n_dev, settings) in rows {
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
            n_dev,
            identity,
            recipe,
        };
        if keep(&s) {
            out.push(s);
        }
    }
    Ok(out)
}

/// A version-3 partition's stored identity sets, each sorted and distinct.
#[derive(Debug, Clone, Default)]
pub struct Sets {
    pub labels: Vec<RowKey>,
    pub keys: Vec<RowKey>,
    pub development: Vec<u64>,
    pub development_keys: Vec<u64>,
}

/// The sets of a version-3 partition (`None` when it stores none).
pub fn sets(conn: &Connection, partition: &str) -> Result<Option<Sets>> {
    type Blobs = (Vec<u8>, Option<Vec<u8>>, Vec<u8>, Option<Vec<u8>>);
    let blobs: Option<Blobs> = conn
        .query_row(
            "SELECT test_labels, test_keys, development, development_keys FROM partition_identities WHERE partition_id = ?1",
            [partition],
            |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?)),
        )
        .optional()
        .map_err(sql_err("read stored identities"))?;
    Ok(blobs.map(|(l, k, d, dk)| Sets {
        labels: ids16(&l),
        keys: ids16(k.as_deref().unwrap_or_default()),
        development: ids8(&d),
        development_keys: ids8(dk.as_deref().unwrap_or_default()),
    }))
}

fn ids16(blob: &[u8]) -> Vec<RowKey> {
    blob.chunks_exact(16)
        .filter_map(|c| RowKey::try_from(c).ok())
        .collect()
}

fn ids8(blob: &[u8]) -> Vec<u64> {
    blob.chunks_exact(8)
        .filter_map(|c| <[u8; 8]>::try_from(c).ok().map(u64::from_le_bytes))
        .collect()
}

fn blob16(ids: &[RowKey]) -> Vec<u8> {
    ids.iter().flat_map(|k| k.iter().copied()).collect()
}

fn blob8(ids: &[u64]) -> Vec<u8> {
    ids.iter().flat_map(|k| k.to_le_bytes()).collect()
}

/// Some rows of a table, identified in every way the stored partitions need, each way once.
pub struct TableIds<'a> {
    table: &'a Table,
    rows: &'a [usize],
    /// The caller's key column, for whole-row identities (versions 1 and 2).
    key: Option<usize>,
    /// The target column, when the rows carry their targets.
    target: Option<usize>,
    threads: usize,
    /// Per recipe's columns: labelled (with a target) or feature identities; `None` when the
    /// table lacks a column.
    content: Vec<(Vec<String>, Option<Vec<RowKey>>)>,
    prints: Vec<(Vec<String>, Option<Vec<u64>>)>,
    keys: Vec<(usize, Vec<Option<RowKey>>)>,
    key_prints: Vec<(usize, Vec<Option<u64>>)>,
    legacy: Vec<(Legacy, Vec<RowKey>)>,
}

/// The index of `key` in a cache, computing its entry with `make` the first time.
fn cached<K: PartialEq, V>(cache: &mut Vec<(K, V)>, key: K, make: impl FnOnce() -> V) -> usize {
    match cache.iter().position(|(k, _)| *k == key) {
        Some(at) => at,
        None => {
            let v = make();
            cache.push((key, v));
            cache.len() - 1
        }
    }
}

impl<'a> TableIds<'a> {
    /// `rows` of `table`; `key` as for whole-row identities; `target` when the rows carry their
    /// targets.
    pub fn new(
        table: &'a Table,
        rows: &'a [usize],
        key: Option<usize>,
        target: Option<usize>,
    ) -> Self {
        TableIds {
            table,
            rows,
            key,
            target,
            threads: crate::data::all_cores(),
            content: Vec::new(),
            prints: Vec::new(),
            keys: Vec::new(),
            key_prints: Vec::new(),
            legacy: Vec::new(),
        }
    }

    /// The rows' content identities under `recipe`: labelled when they carry targets, else
    /// features only; `None` when the table lacks a recipe column.
    fn content(&mut self, recipe: &Recipe) -> Option<&[RowKey]> {
        let (table, rows, target, threads) = (self.table, self.rows, self.target, self.threads);
        let at = cached(
            &mut self.content,
            recipe.columns().to_vec(),
            || match target {
                Some(t) => labelled_ids(table, recipe, t, rows, threads)
                    .map(|p| p.into_iter().map(|(_, l)| l).collect()),
                None => feature_ids(table, recipe, rows, threads),
            },
        );
        self.content[at].1.as_deref()
    }

    /// The rows' labelled fingerprints under `recipe` (rows that carry targets).
    fn prints(&mut self, recipe: &Recipe) -> Option<&[u64]> {
        let (table, rows, threads) = (self.table, self.rows, self.threads);
        let target = self.target?;
        let at = cached(&mut self.prints, recipe.columns().to_vec(), || {
            fingerprints(table, recipe, target, rows, threads)
        });
        self.prints[at].1.as_deref()
    }

    /// The key column of `recipe` in this table.
    fn key_column(&self, recipe: &Recipe) -> Option<usize> {
        recipe
            .key()
            .and_then(|k| crate::data::identity::find(self.table, k))
    }

    /// Whether this table holds the same kind of records as a keyed partition: it has the
    /// partition's key column and two of its feature columns, or its only one (by normalised
    /// name). Its keys then name the partition's records, whatever its cells now say, and
    /// however many of its columns an extract left out. (One shared feature name of several
    /// is not enough: `id` and `age` are in many unrelated files.)
    fn kin(&self, recipe: &Recipe) -> bool {
        let present = recipe
            .columns()
            .iter()
            .filter(|c| crate::data::identity::find(self.table, c).is_some())
            .count();
        let all = recipe.columns().len();
        self.key_column(recipe).is_some() && present > 0 && (present == all || present >= 2)
    }

    /// Whether a partition's keys can be read here: it stored some, and this table has its key
    /// column.
    fn keyed(&self, recipe: &Recipe, s: &Sets) -> bool {
        !s.keys.is_empty() && self.key_column(recipe).is_some()
    }

    fn keys(&mut self, recipe: &Recipe) -> Option<&[Option<RowKey>]> {
        let col = self.key_column(recipe)?;
        let (table, rows, threads) = (self.table, self.rows, self.threads);
        let at = cached(&mut self.keys, col, || key_ids(table, col, rows, threads));
        Some(&self.keys[at].1)
    }

    fn key_prints(&mut self, recipe: &Recipe) -> Option<&[Option<u64>]> {
        let col = self.key_column(recipe)?;
        let (table, rows, threads) = (self.table, self.rows, self.threads);
        let at = cached(&mut self.key_prints, col, || {
            key_fingerprints(table, col, rows, threads)
        });
        Some(&self.key_prints[at].1)
    }

    /// The rows' whole-row identities (versions 1 and 2), with the caller's key.
    fn legacy(&mut self, v: Legacy) -> &[RowKey] {
        let (table, rows, key, threads) = (self.table, self.rows, self.key, self.threads);
        let at = cached(&mut self.legacy, v, || {
            crate::data::row_keys(table, key, rows, threads, v)
        });
        &self.legacy[at].1
    }
}

/// The share of repeated identities up to which a stored set counts as distinct records.
pub const REPEATS: f64 = 0.05;

/// Lookups by identity cost more than a step of a scan, by about this factor.
pub const PROBE_COST: i64 = 16;

/// Which of `ids` are stored in a partition's `partition_rows` (its primary key is
/// (partition_id, row_key); `stored` is about how many rows it holds). One lookup per distinct
/// identity when they are few beside the stored rows, else one pass over them in identity
/// order beside the sorted identities; the answer is the same either way.
pub fn members(
    conn: &Connection,
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
            .prepare_cached(
                "SELECT EXISTS (SELECT 1 FROM partition_rows WHERE partition_id = ?1 AND row_key = ?2)",
            )
            .map_err(err())?;
        for (k, f) in distinct.iter().zip(found.iter_mut()) {
            *f = probe
                .query_row(params![partition, &k[..]], |r| r.get(0))
                .map_err(err())?;
        }
    } else {
        let mut scan = conn
            .prepare_cached(
                "SELECT row_key FROM partition_rows WHERE partition_id = ?1 ORDER BY row_key",
            )
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

/// How many distinct rows a partition's `partition_rows` holds.
fn stored_count(conn: &Connection, partition: &str) -> Result<usize> {
    conn.query_row(
        "SELECT count(*) FROM partition_rows WHERE partition_id = ?1",
        [partition],
        |r| r.get::<_, i64>(0),
    )
    .map(|n| n as usize)
    .map_err(sql_err("count sealed rows"))
}

/// Whether `found` distinct identities of ours (of `ours` distinct in all) that are among a
/// stored set is more than chance explains. A set of `stored_rows` rows that holds
/// `stored_distinct` distinct identities shows how often two records of its kind agree by
/// chance: c = (rows / distinct - 1) / (rows - 1), the share of pairs of its rows that share
/// an identity when each identity is held equally often. One of our identities then meets one
/// of the stored rows by chance with probability about min(1, rows x c), so about
/// E = ours x that would. More than E + 3 sqrt(E) + 2 is beyond chance (a Poisson bound of about
/// three standard deviations, and at least three identities). The stored set, not ours, sets
/// the odds: copies of a row in the file cannot raise them. A set whose repeats are at most
/// one in twenty of its rows is taken to hold records entered twice, not coarse cells: its
/// odds of chance are none (else one duplicate would let rows that match nothing, padded into
/// a file, raise the bar past every real match).
pub fn beyond_chance(found: usize, ours: usize, stored_rows: i64, stored_distinct: usize) -> bool {
    let (n, d) = (stored_rows as f64, stored_distinct as f64);
    let c = if n > 1.0 && d > 0.0 && n - d > REPEATS * n {
        ((n / d - 1.0) / (n - 1.0)).max(0.0)
    } else {
        0.0
    };
    let e = ours as f64 * (n * c).min(1.0);
    found as f64 > e + 3.0 * e.sqrt() + 2.0
}

/// Whether a set of `rows` rows holding `distinct` identities repeats more than `REPEATS` of
/// them: its cells are too coarse to tell records apart.
fn coarse(rows: i64, distinct: usize) -> bool {
    rows as f64 - distinct as f64 > REPEATS * rows as f64
}

/// Distinct identities among `ids`, and among those that `hit` marks.
fn distinct_counts<T: Ord + Copy>(ids: &[T], hit: &[bool]) -> (usize, usize) {
    let mut all: Vec<T> = ids.to_vec();
    all.sort_unstable();
    all.dedup();
    let mut found: Vec<T> = ids
        .iter()
        .zip(hit)
        .filter(|(_, h)| **h)
        .map(|(k, _)| *k)
        .collect();
    found.sort_unstable();
    found.dedup();
    (all.len(), found.len())
}

/// Rows of a file that are another file's partition's test rows: a run's rows (`ids` with
/// their target), for each partition of `parts` whose test rows the file holds, the positions
/// into `ids`' rows. Version 3: by labelled identity and key, in a file related to the
/// partition (module documentation); versions 1 and 2: by whole-row identity, exactly.
pub fn run_overlaps(
    conn: &Connection,
    ids: &mut TableIds,
    parts: &[Stored],
) -> Result<Vec<(String, Vec<usize>)>> {
    let mut out = Vec::new();
    for p in parts.iter().filter(|p| p.n_test > 0) {
        let hit = match (p.identity.legacy(), &p.recipe) {
            (Some(v), _) => {
                let keys: Vec<Option<RowKey>> = ids.legacy(v).iter().copied().map(Some).collect();
                members(conn, &p.id, p.n_test, &keys)?
            }
            (None, Some(recipe)) => {
                let Some(s) = sets(conn, &p.id)? else {
                    continue;
                };
                let keys = |ids: &mut TableIds, hit: &mut Vec<bool>| {
                    if !s.keys.is_empty()
                        && let Some(k) = ids.keys(recipe)
                    {
                        for (h, k) in hit.iter_mut().zip(k) {
                            *h |= k.is_some_and(|k| s.keys.binary_search(&k).is_ok());
                        }
                    }
                };
                let mut hit = vec![false; ids.rows.len()];
                // Rows its cells cannot tell apart are followed by key alone, where the key
                // can be read; else by content, beyond chance.
                let is_coarse = coarse(p.n_test, s.labels.len());
                let by_key = is_coarse && ids.keyed(recipe, &s);
                let mut related = false;
                if !by_key && let Some(content) = ids.content(recipe) {
                    let m: Vec<bool> = content
                        .iter()
                        .map(|k| s.labels.binary_search(k).is_ok())
                        .collect();
                    let (ours, found) = distinct_counts(content, &m);
                    if beyond_chance(found, ours, p.n_test, s.labels.len()) {
                        hit = m;
                        related = true;
                    }
                }
                if is_coarse || related || ids.kin(recipe) {
                    keys(ids, &mut hit);
                }
                hit
            }
            (None, None) => continue,
        };
        let rows: Vec<usize> = (0..hit.len()).filter(|&i| hit[i]).collect();
        if !rows.is_empty() {
            out.push((p.id.clone(), rows));
        }
    }
    Ok(out)
}

/// Whether column `target` of a file (another than the partition's own) holds a partition's
/// sealed targets on `rows` (the file's row indices, found as that partition's test rows): with
/// it as the target, at least nine in ten of the rows have one of the partition's labelled
/// test identities. An older partition keeps whole-row identities, which found the rows with
/// every cell: there the column's name is all there is to go by.
pub fn holds_target(
    conn: &Connection,
    table: &Table,
    rows: &[usize],
    partition: &str,
    target: usize,
) -> Result<bool> {
    let Some(p) = stored(conn, |p| p.id == partition)?.into_iter().next() else {
        return Ok(false);
    };
    match (p.identity.legacy(), &p.recipe) {
        (Some(_), _) => Ok(true),
        (None, Some(recipe)) => {
            let Some(s) = sets(conn, &p.id)? else {
                return Ok(false);
            };
            let mut ids = TableIds::new(table, rows, None, Some(target));
            let Some(labels) = ids.content(recipe) else {
                return Ok(false);
            };
            let found = labels
                .iter()
                .filter(|l| s.labels.binary_search(l).is_ok())
                .count();
            Ok(!labels.is_empty() && 10 * found >= 9 * labels.len())
        }
        (None, None) => Ok(false),
    }
}

/// Rows of a file that were another file's partition's development rows: for each
/// version-3 partition of `parts` (an older one stores none), by labelled and key
/// fingerprints, in a file related to it.
pub fn run_developed(
    conn: &Connection,
    ids: &mut TableIds,
    parts: &[Stored],
) -> Result<Vec<(String, Vec<usize>)>> {
    let mut out = Vec::new();
    for p in parts.iter().filter(|p| p.identity == Identity::V3) {
        let (Some(recipe), Some(s)) = (&p.recipe, sets(conn, &p.id)?) else {
            continue;
        };
        let mut hit = vec![false; ids.rows.len()];
        let mut related = false;
        if let Some(prints) = ids.prints(recipe) {
            let m: Vec<bool> = prints
                .iter()
                .map(|k| s.development.binary_search(k).is_ok())
                .collect();
            let (ours, found) = distinct_counts(prints, &m);
            if beyond_chance(found, ours, p.n_dev, s.development.len()) {
                hit = m;
                related = true;
            }
        }
        if (related || ids.kin(recipe))
            && !s.development_keys.is_empty()
            && let Some(k) = ids.key_prints(recipe)
        {
            for (h, k) in hit.iter_mut().zip(k) {
                *h |= k.is_some_and(|k| s.development_keys.binary_search(&k).is_ok());
            }
        }
        let rows: Vec<usize> = (0..hit.len()).filter(|&i| hit[i]).collect();
        if !rows.is_empty() {
            out.push((p.id.clone(), rows));
        }
    }
    Ok(out)
}

/// The model whose predictions are asked for: the features it reads (normalised names), and
/// its run's own test-row identities when its features differ from its partition's recipe.
pub struct Predictor<'a> {
    pub features: Vec<String>,
    /// (partition, the run's recipe, the partition's test rows' feature identities under it).
    pub own: Option<(&'a str, Recipe, Vec<RowKey>)>,
}

/// Rows to predict that are partitions' test rows (module documentation), per partition.
pub fn predicted(
    conn: &Connection,
    ids: &mut TableIds,
    parts: &[Stored],
    model: &Predictor,
) -> Result<Vec<(String, Vec<usize>)>> {
    let mut out = Vec::new();
    let mut assignment = conn
        .prepare_cached("SELECT assignment FROM partitions WHERE id = ?1")
        .map_err(sql_err("find sealed rows"))?;
    for p in parts.iter().filter(|p| p.n_test > 0) {
        let mut hit = vec![false; ids.rows.len()];
        if p.data_sha256 == ids.table.sha256 {
            // The partition's own data file: its test rows by position, exactly.
            let a: Vec<u8> = assignment
                .query_row([&p.id], |r| r.get(0))
                .map_err(sql_err("find sealed rows"))?;
            for (h, &r) in hit.iter_mut().zip(ids.rows) {
                *h |= a.get(r) == Some(&crate::split::Part::Test.code());
            }
        }
        match (p.identity.legacy(), &p.recipe) {
            (Some(v), _) => {
                let keys: Vec<Option<RowKey>> = ids.legacy(v).iter().copied().map(Some).collect();
                let m = members(conn, &p.id, p.n_test, &keys)?;
                hit.iter_mut().zip(m).for_each(|(h, m)| *h |= m);
            }
            (None, Some(recipe)) => {
                // Feature identities whatever the file's target: equal features, equal
                // predictions.
                let features = {
                    let (table, rows, threads) = (ids.table, ids.rows, ids.threads);
                    feature_ids(table, recipe, rows, threads)
                };
                let mut related = false;
                let stored = stored_count(conn, &p.id)?;
                // Rows its cells cannot tell apart (a few categories): a new record looks like
                // a sealed one, so the key decides where it can be read; else a file counts
                // by content only when it is related beyond chance (a copy of the data).
                let is_coarse = coarse(p.n_test, stored);
                let stored_sets = sets(conn, &p.id)?;
                let by_key =
                    is_coarse && stored_sets.as_ref().is_some_and(|s| ids.keyed(recipe, s));
                if !by_key && let Some(f) = features {
                    let given: Vec<Option<RowKey>> = f.iter().copied().map(Some).collect();
                    let m = members(conn, &p.id, p.n_test, &given)?;
                    let exact = !is_coarse
                        && !model.features.is_empty()
                        && model.features.iter().all(|x| recipe.columns().contains(x));
                    let (ours, found) = distinct_counts(&f, &m);
                    related = found > 0 && (exact || beyond_chance(found, ours, p.n_test, stored));
                    if related {
                        hit.iter_mut().zip(m).for_each(|(h, m)| *h |= m);
                    }
                }
                if (related || is_coarse || ids.kin(recipe))
                    && let Some(s) = &stored_sets
                    && !s.keys.is_empty()
                    && let Some(k) = ids.keys(recipe)
                {
                    for (h, k) in hit.iter_mut().zip(k) {
                        *h |= k.is_some_and(|k| s.keys.binary_search(&k).is_ok());
                    }
                }
            }
            (None, None) => {}
        }
        if let Some((own, recipe, test)) = &model.own
            && *own == p.id
            && let Some(f) = feature_ids(ids.table, recipe, ids.rows, ids.threads)
        {
            for (h, k) in hit.iter_mut().zip(&f) {
                *h |= test.binary_search(k).is_ok();
            }
        }
        let rows: Vec<usize> = (0..hit.len()).filter(|&i| hit[i]).collect();
        if !rows.is_empty() {
            out.push((p.id.clone(), rows));
        }
    }
    Ok(out)
}

/// Store a new version-3 partition's identity sets.
pub fn insert_sets(
    tx: &Connection,
    partition: &str,
    ids: &crate::runner::Identities,
    keyed: bool,
) -> rusqlite::Result<()> {
    tx.execute(
        "INSERT OR IGNORE INTO partition_identities (partition_id, test_labels, test_keys, development, development_keys)
         VALUES (?1, ?2, ?3, ?4, ?5)",
        params![
            partition,
            blob16(&ids.test_labels),
            keyed.then(|| blob16(&ids.test_keys)),
            blob8(&ids.development),
            keyed.then(|| blob8(&ids.development_keys)),
        ],
    )?;
    Ok(())
}

/// Store a run's own test-row identities, when its recipe differs from its partition's.
pub fn insert_run(
    tx: &Connection,
    run: i64,
    recipe: &Recipe,
    test: &[RowKey],
) -> rusqlite::Result<()> {
    let mut sorted = test.to_vec();
    sorted.sort_unstable();
    sorted.dedup();
    tx.execute(
        "INSERT INTO run_identities (run_id, recipe, test_rows) VALUES (?1, ?2, ?3)",
        params![run, recipe.to_json().to_string(), blob16(&sorted)],
    )?;
    Ok(())
}

/// A run's own recipe and test-row identities, when it stored them.
pub fn run_ids(conn: &Connection, run: i64) -> Result<Option<(Recipe, Vec<RowKey>)>> {
    let row: Option<(String, Vec<u8>)> = conn
        .query_row(
            "SELECT recipe, test_rows FROM run_identities WHERE run_id = ?1",
            [run],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .optional()
        .map_err(sql_err("read a run's identities"))?;
    Ok(row.and_then(|(recipe, blob)| {
        let v: Value = serde_json::from_str(&recipe).ok()?;
        Some((Recipe::from_json(&v)?, ids16(&blob)))
    }))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A stored set of distinct identities: chance explains no match, so three are beyond it
    /// and two are not (the margin of two). A stored set of eight kinds of rows: any row meets
    /// one of them by chance, so even every row matching is not evidence. Copies of a row on
    /// our side change nothing: the stored set sets the odds.
    #[test]
    fn matches_count_only_beyond_what_chance_explains() {
        assert!(!beyond_chance(2, 500, 100, 100));
        assert!(beyond_chance(3, 500, 100, 100));
        // 200 stored rows of 8 identities: c = (25 - 1) / 199 = 0.1206, rows x c = 24 > 1, so
        // E = 1000 and nothing is beyond it.
        assert!(!beyond_chance(1000, 1000, 200, 8));
        // 1000 stored rows, 990 distinct: ten records entered twice, no sign of coarse cells;
        // chance explains nothing, whatever the file adds.
        assert!(beyond_chance(3, 1_000_000, 1000, 990));
        // 1000 stored rows, 900 distinct: c = (1000 / 900 - 1) / 999 = 1.1123e-4, rows x c =
        // 0.1112, E = 500 x 0.1112 = 55.6, the bound 55.6 + 3 x 7.457 + 2 = 79.97.
        assert!(!beyond_chance(79, 500, 1000, 900));
        assert!(beyond_chance(80, 500, 1000, 900));
        assert!(!beyond_chance(0, 0, 10, 10));
    }
}
