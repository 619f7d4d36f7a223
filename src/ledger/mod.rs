//! The SQLite ledger: the only code that speaks SQL. Opens (WAL, foreign keys, busy timeout),
//! migrates, writes one run per transaction, and answers typed read queries.

pub mod bundle;
pub mod chain;
pub mod migrate;
pub mod rows;
pub mod starts;

use crate::error::{Error, Result};
use crate::runner::{RunOutcome, Scores};
use crate::split::Part;
use rusqlite::types::{ToSqlOutput, ValueRef};
use rusqlite::{Connection, OptionalExtension, params};
use serde_json::Value;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// Why a command that records refuses a ledger it can only read.
const READ_ONLY: &str = "is read-only (the file, its folder or the disk cannot be written); nothing was recorded. Make it writable or pass another --ledger path; history, show, audit, export, compare, plot, report and predict still read it";

/// A `file:` URI for SQLite (percent-encoding what a URI cannot hold as is).
fn url_path(path: &Path) -> String {
    let abs = std::fs::canonicalize(path).unwrap_or_else(|_| path.to_path_buf());
    let mut out = String::from("file:");
    for b in abs.to_string_lossy().bytes() {
        if b.is_ascii_alphanumeric() || b"/-_.~".contains(&b) {
            out.push(b as char);
        } else {
            out.push_str(&format!("%{b:02X}"));
        }
    }
    out
}

/// How often `open` tries again on a busy ledger, 50 ms apart (the 10 s of the busy timeout).
const OPEN_TRIES: usize = 200;

/// Whether an error is the ledger being busy (another process holding its lock).
fn is_busy(e: &Error) -> bool {
    match e {
        Error::LedgerRefused { msg, .. } => msg.starts_with("is busy"),
        Error::Ledger { source, .. } => matches!(
            source.sqlite_error_code(),
            Some(rusqlite::ErrorCode::DatabaseBusy | rusqlite::ErrorCode::DatabaseLocked)
        ),
        _ => false,
    }
}

/// Test-row identities written per statement.
const KEYS_PER_STATEMENT: usize = 500;

/// An open ledger.
pub struct Ledger {
    conn: Connection,
    path: PathBuf,
    /// The partition `record_partition` last inserted as new, with its number of distinct
    /// test-row identities: `write_run` hashes those rows for the chain from memory.
    fresh: Option<(String, usize)>,
}

/// Facts about a run that come from outside the runner (the CLI reads clock and environment).
#[derive(Debug, Clone)]
pub struct RunMeta {
    pub started_at: String,
    pub finished_at: String,
    pub tool_version: String,
    pub user: String,
    pub host: String,
    pub threads: usize,
    pub spec_path: String,
    pub data_path: String,
    pub note: Option<String>,
    /// The tool's git commit and target triple at build time.
    pub tool_commit: String,
    pub target_triple: String,
    /// Set when this run is the replay of another, with the comparison's result.
    pub replay: Option<ReplayRecord>,
    /// The start this run recorded (`Ledger::begin_run`), deleted as the run is stored.
    pub start: Option<i64>,
}

/// The outcome of a replay, stored with the replay's own run.
#[derive(Debug, Clone)]
pub struct ReplayRecord {
    pub replay_of: i64,
    pub identical: bool,
    pub compared: i64,
    pub differing: i64,
    /// JSON array of the first differences.
    pub differences: String,
}

/// One line of `history`.
#[derive(Debug, Clone)]
pub struct RunSummary {
    pub id: i64,
    pub experiment: String,
    pub started_at: String,
    pub status: String,
    pub data_sha256: String,
    pub partition_id: String,
    pub candidates: i64,
    pub metric: String,
    pub selected: i64,
    pub selected_family: String,
    pub selected_params: Value,
    pub selected_score: Option<f64>,
    pub note: Option<String>,
}

/// Which runs a listing keeps: an experiment name, and a start time (RFC 3339 UTC with
/// milliseconds, as stored: the runs started at or after it).
#[derive(Debug, Clone, Default)]
pub struct RunFilter {
    pub experiment: Option<String>,
    pub since: Option<String>,
}

/// A stored score: mean over folds and its standard error.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Stat {
    pub mean: Option<f64>,
    pub se: Option<f64>,
}

#[derive(Debug, Clone)]
pub struct CandidateRow {
    pub id: i64,
    /// Why an external command failed, if it did.
    pub failure: Option<String>,
    pub family: String,
    pub params: Value,
    pub standardize: bool,
    pub seed: String,
    /// metric name -> stat, for "train" and "validation".
    pub train: BTreeMap<String, Stat>,
    pub validation: BTreeMap<String, Stat>,
}

#[derive(Debug, Clone)]
pub struct FoldRow {
    pub repeat: i64,
    pub fold: i64,
    pub n_fit: i64,
    pub n_score: i64,
}

/// One stored fold score: (repeat, fold, part, metric, value).
pub type FoldScore = (i64, i64, String, String, Option<f64>);

/// Everything stored about one run.
#[derive(Debug, Clone)]
pub struct RunDetail {
    pub summary: RunSummary,
    pub finished_at: String,
    pub tool_version: String,
    pub user: String,
    pub host: String,
    pub threads: i64,
    pub seed: String,
    pub spec_path: String,
    pub spec_text: String,
    pub spec_hash: String,
    pub data_path: String,
    pub data_rows: i64,
    pub data_columns: i64,
    pub rows_used: i64,
    pub n_train: i64,
    pub n_validation: i64,
    pub n_test: i64,
    pub holdout: bool,
    /// Canonical JSON of the split settings (method, seed, fractions, folds, columns).
    pub split_settings: String,
    /// The row identity version of the run's partition (`crate::data::Identity`).
    pub identity: i64,
    pub rule: String,
    pub best: i64,
    pub model_json: String,
    pub folds: Vec<FoldRow>,
    pub candidates: Vec<CandidateRow>,
    pub warnings: Vec<String>,
    /// Runs and candidates scored on this run's development partition up to this run.
    pub partition_runs: i64,
    pub partition_candidates: i64,
    /// Nested cross-validation result, when the spec asked for it.
    pub nested: Option<NestedRow>,
}

/// A stored nested cross-validation estimate.
#[derive(Debug, Clone)]
pub struct NestedRow {
    pub metric: String,
    pub estimate: Option<f64>,
    pub se: Option<f64>,
    pub outer_folds: i64,
    pub selections: Value,
}

fn sql_err(context: &str) -> impl FnOnce(rusqlite::Error) -> Error + '_ {
    move |e| Error::Ledger {
        context: context.to_string(),
        source: e,
    }
}

impl Ledger {
    /// Open (creating the file when `create`) and migrate. Processes that open a new ledger
    /// at once can meet SQLite's busy state where it does not wait (switching the new file to
    /// WAL while another creates its tables): the open is tried again, for up to the busy
    /// timeout, before it is refused as busy.
    pub fn open(path: &Path, create: bool) -> Result<Ledger> {
        let mut tries = 0;
        loop {
            match Ledger::open_once(path, create) {
                Err(e) if is_busy(&e) && tries < OPEN_TRIES => {
                    tries += 1;
                    std::thread::sleep(std::time::Duration::from_millis(50));
                }
                other => return other,
            }
        }
    }

    fn open_once(path: &Path, create: bool) -> Result<Ledger> {
        if let Some(dir) = path.parent().filter(|d| !d.as_os_str().is_empty())
            && !dir.is_dir()
        {
            return Err(Error::LedgerRefused {
                path: path.to_path_buf(),
                msg: format!(
                    "the folder {} does not exist; create it or pass another --ledger path",
                    dir.display()
                ),
            });
        }
        if let Some(kind) = crate::files::not_regular(path) {
            return Err(Error::LedgerRefused {
                path: path.to_path_buf(),
                msg: format!(
                    "is {kind}, not a ledger file; pass the path of a ledger file (or of none yet, to create one)"
                ),
            });
        }
        if !create && !path.exists() {
            return Err(Error::LedgerRefused {
                path: path.to_path_buf(),
                msg: "does not exist; run an experiment first (probity run SPEC) or pass --ledger"
                    .into(),
            });
        }
        let mut conn =
            Connection::open(path).map_err(|e| migrate::refuse_or_fail(path, e, "open"))?;
        // SQLite falls back to reading a file it cannot write; a command that records must
        // know now, before any work, not at its first write.
        if path.exists()
            && conn
                .is_readonly(rusqlite::MAIN_DB)
                .map_err(sql_err("check write access"))?
        {
            return Err(Error::LedgerRefused {
                path: path.to_path_buf(),
                msg: READ_ONLY.into(),
            });
        }
        conn.busy_timeout(std::time::Duration::from_secs(10))
            .map_err(sql_err("set busy timeout"))?;
        // journal_mode answers with a row; a non-database file fails here first.
        let _mode: String = conn
            .query_row("PRAGMA journal_mode = WAL", [], |r| r.get(0))
            .map_err(|e| migrate::refuse_or_fail(path, e, "set WAL mode"))?;
        conn.pragma_update(None, "foreign_keys", "ON")
            .map_err(sql_err("enable foreign keys"))?;
        // A run is written in one transaction; a cache that holds it all keeps SQLite from
        // spilling pages mid-transaction (64 MiB, allocated only as used).
        conn.pragma_update(None, "cache_size", -CACHE_KIB)
            .map_err(sql_err("set cache size"))?;
        migrate::migrate(&mut conn, path)?;
        Ok(Ledger {
            conn,
            path: path.to_path_buf(),
            fresh: None,
        })
    }

    /// Open an existing ledger for reading only: as `open` when it is writable; otherwise (a
    /// read-only file, folder or medium, such as an archived copy) read-only, so the listing
    /// and report commands still work. A read-only ledger is never migrated: one from an older
    /// probity is refused with the way out.
    pub fn open_read(path: &Path) -> Result<Ledger> {
        let first = match Ledger::open(path, false) {
            Ok(l) => return Ok(l),
            Err(e) => e,
        };
        if !matches!(&first, Error::LedgerRefused { .. }) || !path.is_file() {
            return Err(first);
        }
        use rusqlite::OpenFlags as F;
        let flags = F::SQLITE_OPEN_READ_ONLY | F::SQLITE_OPEN_URI | F::SQLITE_OPEN_NO_MUTEX;
        let uri = |extra: &str| {
            let mut u = url_path(path);
            u.push_str(extra);
            u
        };
        // mode=ro reads the log files when they exist; immutable=1 needs none, and is safe only
        // when no log holds commits the main file lacks (nothing can write here meanwhile).
        let wal = path.with_file_name(format!(
            "{}-wal",
            path.file_name()
                .map_or_else(|| "".into(), |n| n.to_string_lossy())
        ));
        let wal_empty = std::fs::metadata(&wal).map_or(true, |m| m.len() == 0);
        let conn = Connection::open_with_flags(uri("?mode=ro"), flags)
            .and_then(|c| {
                c.query_row("PRAGMA user_version", [], |r| r.get::<_, i64>(0))
                    .map(|_| c)
            })
            .or_else(|e| {
                if wal_empty {
                    Connection::open_with_flags(uri("?mode=ro&immutable=1"), flags)
                } else {
                    Err(e)
                }
            })
            .map_err(|_| first)?;
        let version: i64 = conn
            .query_row("PRAGMA user_version", [], |r| r.get(0))
            .map_err(|e| migrate::refuse_or_fail(path, e, "read schema version"))?;
        if version != migrate::latest() {
            return Err(Error::LedgerRefused {
                path: path.to_path_buf(),
                msg: format!(
                    "is read-only and has schema version {version}; this probity reads version {} (open it once where it can be written, so it is brought up to date, or use the probity that wrote it)",
                    migrate::latest()
                ),
            });
        }
        Ok(Ledger {
            conn,
            path: path.to_path_buf(),
            fresh: None,
        })
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Store a whole run in one transaction; returns the run id.
    pub fn write_run(
        &mut self,
        spec: &crate::spec::Spec,
        table: &crate::data::Table,
        out: &RunOutcome,
        meta: &RunMeta,
    ) -> Result<i64> {
        self.bulk(|l| l.write_run_rows(spec, table, out, meta))
    }

    /// Run `write` with SQLite's row-by-row foreign-key checks off (a pragma, so outside any
    /// transaction), and on again afterwards whatever happened. For the two bulk writes only:
    /// every reference in their rows points to a row the same transaction wrote or made sure
    /// of, and they check those references themselves with a few indexed queries before they
    /// commit (`check_run_references`). A check per row cost about a third of the insert
    /// time of a 10,000-candidate run. `audit --verify` checks every reference of the whole
    /// ledger (`orphans`).
    fn bulk<T>(&mut self, write: impl FnOnce(&mut Ledger) -> Result<T>) -> Result<T> {
        self.conn
            .pragma_update(None, "foreign_keys", "OFF")
            .map_err(sql_err("pause foreign-key checks"))?;
        let out = write(self);
        let back = self
            .conn
            .pragma_update(None, "foreign_keys", "ON")
            .map_err(sql_err("resume foreign-key checks"));
        let out = out?;
        back?;
        Ok(out)
    }

    fn write_run_rows(
        &mut self,
        spec: &crate::spec::Spec,
        table: &crate::data::Table,
        out: &RunOutcome,
        meta: &RunMeta,
    ) -> Result<i64> {
        let path = self.path.clone();
        let fail = |e: rusqlite::Error| migrate::refuse_or_fail(&path, e, "write run");
        // IMMEDIATE takes the write lock up front, so a concurrent writer waits on the busy
        // timeout instead of failing on a stale read snapshot.
        let tx = self
            .conn
            .transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)
            .map_err(fail)?;
        let prep = &out.prepared;
        let s = &prep.sealed;
        let inserted = insert_partition(&tx, spec, table, prep, &prep.ids).map_err(fail)?;
        let mark = SealMark {
            at: &meta.started_at,
            user: &meta.user,
            host: &meta.host,
        };
        settle_seal(&tx, &prep.partition_id, Some(spec), &mark)?;
        // Other partitions' test rows among this run's development rows, decided here, inside
        // the run's transaction, so a partition stored meanwhile is seen. A replay adds no
        // look: its scores are the original's.
        let mut warnings = out.warnings.clone();
        let mut uses = Vec::new();
        if meta.replay.is_none() {
            let overlapping = development_overlaps(&tx, table, prep)?;
            let (u, w) = crate::guard::consult::development(s.development().len(), &overlapping)?;
            uses = u;
            warnings.extend(w);
            let earlier = earlier_developments(&tx, table, prep)?;
            warnings.extend(crate::guard::consult::not_fresh(
                s.count(Part::Test),
                &earlier,
            ));
        }
        // The partition's rows are these identities when they went in as new, here or in this
        // connection's `record_partition` of the same partition (the same identities: the same
        // number of distinct ones); otherwise the chain reads them back.
        let keys = sorted_keys(&prep.ids.test);
        let recorded = self.fresh.take();
        let partition_known = (inserted
            || recorded
                .as_ref()
                .is_some_and(|(id, n)| *id == prep.partition_id && *n == distinct(&keys)))
        .then(|| {
            let known = vec![(
                "partition_rows",
                chain::PartitionRows {
                    id: &prep.partition_id,
                    keys: &keys,
                },
            )];
            known
        });
        let model_json = serde_json::to_string(&out.refit)
            .map_err(|e| Error::Internal(format!("serialise model: {e}")))?;
        tx.execute(
            "INSERT INTO runs (experiment, status, started_at, finished_at, tool_version, user, host, threads, seed, spec_path, spec_text, spec_hash,
                data_path, data_sha256, data_rows, data_columns, rows_used, partition_id, holdout, metric, rule, best, selected, model_json, note,
                tool_commit, target_triple, predictions_digest, replay_of)
             VALUES (?1, 'complete', ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15, ?16, ?17, ?18, ?19, ?20, ?21, ?22, ?23, ?24,
                ?25, ?26, ?27, ?28)",
            params![
                spec.name,
                meta.started_at,
                meta.finished_at,
                meta.tool_version,
                meta.user,
                meta.host,
                meta.threads as i64,
                spec.split.seed.to_string(),
                meta.spec_path,
                spec.text,
                spec.canonical_hash(),
                meta.data_path,
                table.sha256,
                table.n_rows() as i64,
                table.columns.len() as i64,
                prep.rows.len() as i64,
                prep.partition_id,
                s.holdout(),
                out.metric.name(),
                match out.rule {
                    crate::spec::Rule::Min => "min",
                    crate::spec::Rule::OneSe => "one-se",
                },
                out.best as i64,
                out.selected as i64,
                model_json,
                meta.note,
                meta.tool_commit,
                meta.target_triple,
                out.predictions_digest,
                meta.replay.as_ref().map(|r| r.replay_of)
            ],
        )
        .map_err(fail)?;
        let run = tx.last_insert_rowid();
        let nm = out.prepared.metrics.len();
        let mut by_name: Vec<usize> = (0..nm).collect();
        by_name.sort_by_key(|&k| out.prepared.metrics[k].name());
        // Every score row of the run, each value as SQLite gives it back (`chain::stored_real`;
        // binding it stores what binding the raw score stored). The insert and the chain's hash
        // take their rows from here, so they cannot disagree. Candidates in order, each one's
        // folds in order, parts and metrics by name: primary-key order when the candidates and
        // their folds are in order. Each (candidate, fold) gives 2 x nm fold rows, each
        // candidate 2 x nm score rows.
        let name = |k: usize| ValueRef::Text(out.prepared.metrics[k].name().as_bytes());
        let fold_rows = |emit: RowOut| {
            for c in &out.candidates {
                for f in &c.folds {
                    for (part, sc) in [("train", &f.train), ("validation", &f.validation)] {
                        for &k in &by_name {
                            emit(&[
                                ValueRef::Integer(run),
                                ValueRef::Integer(c.id as i64),
                                ValueRef::Integer(f.repeat as i64),
                                ValueRef::Integer(f.fold as i64),
                                ValueRef::Text(part.as_bytes()),
                                name(k),
                                chain::stored_real(sc[k]),
                            ]);
                        }
                    }
                }
            }
        };
        let score_rows = |emit: RowOut| {
            for c in &out.candidates {
                let sets: [(&str, &Scores, &Scores); 2] = [
                    ("train", &c.train, &c.train_se),
                    ("validation", &c.validation, &c.validation_se),
                ];
                for (part, mean, se) in sets {
                    for &k in &by_name {
                        emit(&[
                            ValueRef::Integer(run),
                            ValueRef::Integer(c.id as i64),
                            ValueRef::Text(part.as_bytes()),
                            name(k),
                            chain::stored_real(mean[k]),
                            chain::stored_real(se[k]),
                        ]);
                    }
                }
            }
        };
        {
            let mut fold_stmt = tx.prepare("INSERT INTO folds (run_id, repeat, fold, n_fit, n_score) VALUES (?1, ?2, ?3, ?4, ?5)").map_err(fail)?;
            for f in s.folds() {
                fold_stmt
                    .execute(params![
                        run,
                        f.repeat as i64,
                        f.index as i64,
                        f.fit.len() as i64,
                        f.score.len() as i64
                    ])
                    .map_err(fail)?;
            }
            let mut cand = tx.prepare("INSERT INTO candidates (run_id, id, family, params, standardize, seed) VALUES (?1, ?2, ?3, ?4, ?5, ?6)").map_err(fail)?;
            for c in &out.candidates {
                let p: serde_json::Map<String, Value> = c
                    .params
                    .iter()
                    .map(|(k, v)| (k.clone(), v.to_json()))
                    .collect();
                cand.execute(params![
                    run,
                    c.id as i64,
                    c.family.name(),
                    Value::Object(p).to_string(),
                    c.standardize,
                    c.seed.to_string()
                ])
                .map_err(fail)?;
            }
            // 2 x nm rows per statement (a (candidate, fold)'s fold rows, a candidate's score
            // rows): a 10,000-candidate grid writes 30,000 statements, not 180,000. Borrowed
            // values, no allocation per value; rows in primary-key order, so each lands beside
            // the one before.
            insert_rows(
                &tx,
                "fold_scores (run_id, candidate, repeat, fold, part, metric, value)",
                7,
                2 * nm,
                &fold_rows,
            )
            .map_err(fail)?;
            insert_rows(
                &tx,
                "scores (run_id, candidate, part, metric, mean, se)",
                6,
                2 * nm,
                &score_rows,
            )
            .map_err(fail)?;
            let mut warn = tx
                .prepare("INSERT INTO warnings (run_id, seq, message) VALUES (?1, ?2, ?3)")
                .map_err(fail)?;
            for (i, w) in warnings.iter().enumerate() {
                warn.execute(params![run, i as i64, w]).map_err(fail)?;
            }
            let mut used = tx
                .prepare("INSERT INTO uses (run_id, partition_id, n_rows) VALUES (?1, ?2, ?3)")
                .map_err(fail)?;
            for (partition, rows) in &uses {
                settle_seal(&tx, partition, None, &mark)?;
                used.execute(params![run, partition, rows]).map_err(fail)?;
            }
            // A run whose features differ from its partition's recipe keeps the test rows'
            // identities under its own, for its model's predictions.
            if prep.identity == crate::data::Identity::V3 {
                let stored = rows::stored(&tx, |p| p.id == prep.partition_id)?;
                if stored
                    .first()
                    .and_then(|p| p.recipe.as_ref())
                    .is_some_and(|r| *r != prep.recipe)
                {
                    rows::insert_run(&tx, run, &prep.recipe, &prep.ids.test).map_err(fail)?;
                }
            }
        }
        for c in out.candidates.iter().filter(|c| c.failure.is_some()) {
            tx.execute(
                "UPDATE candidates SET failure = ?3 WHERE run_id = ?1 AND id = ?2",
                params![run, c.id as i64, c.failure],
            )
            .map_err(fail)?;
        }
        for (path, sha) in &out.inputs {
            tx.execute(
                "INSERT INTO run_inputs (run_id, path, sha256) VALUES (?1, ?2, ?3)",
                params![run, path, sha],
            )
            .map_err(fail)?;
        }
        if let Some(r) = &meta.replay {
            tx.execute(
                "INSERT INTO replays (run_id, replay_of, identical, compared, differing, differences) VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
                params![run, r.replay_of, r.identical, r.compared, r.differing, r.differences],
            )
            .map_err(fail)?;
        }
        if let Some(n) = &out.nested {
            let sel: Vec<Value> = n
                .selections
                .iter()
                .map(|(c, v)| serde_json::json!({"candidate": c, "score": v}))
                .collect();
            tx.execute(
                "INSERT INTO nested (run_id, metric, estimate, se, outer_folds, selections) VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
                params![run, n.metric.name(), n.estimate, n.se, n.selections.len() as i64, Value::Array(sel).to_string()],
            )
            .map_err(fail)?;
        }
        check_run_references(
            &tx,
            run,
            &prep.partition_id,
            meta.replay.as_ref().map(|r| r.replay_of),
        )?;
        // The score rows as just written, in primary-key order when candidates and folds are
        // in order (always, from the runner; otherwise the chain reads them back): a
        // 10,000-candidate run's 180,000 score rows are not read back to be hashed.
        let ordered = out.candidates.windows(2).all(|w| w[0].id < w[1].id)
            && out.candidates.iter().all(|c| {
                c.folds
                    .windows(2)
                    .all(|w| (w[0].repeat, w[0].fold) < (w[1].repeat, w[1].fold))
            });
        let fold_sink = |sink: &mut chain::RowSink| fold_rows(&mut |row| sink.row(row));
        let score_sink = |sink: &mut chain::RowSink| score_rows(&mut |row| sink.row(row));
        let mut known = chain::Known {
            partition: partition_known.unwrap_or_default(),
            sections: Vec::new(),
        };
        if ordered {
            known.sections = vec![
                ("fold_scores", &fold_sink as chain::RowsFn),
                ("scores", &score_sink),
            ];
        }
        chain::append_known(&tx, "run", run, None, Some(&known))?;
        if let Some(start) = meta.start {
            // The start and the stored run are never both present, nor both absent.
            tx.execute("DELETE FROM run_starts WHERE id = ?1", [start])
                .map_err(fail)?;
        }
        crate::failpoint::pause("run:commit");
        tx.commit().map_err(fail)?;
        Ok(run)
    }

    /// Store a run's partition and its test rows' identities in a transaction of their own,
    /// while the grid still runs; true when the partition was new. Partitions are named by
    /// their content, so storing one again changes nothing, and `write_run` stores it too when
    /// it is missing.
    pub fn record_partition(
        &mut self,
        spec: &crate::spec::Spec,
        table: &crate::data::Table,
        prep: &crate::runner::Prepared,
        ids: &crate::runner::Identities,
        mark: &SealMark,
    ) -> Result<bool> {
        self.bulk(|l| l.record_partition_rows(spec, table, prep, ids, mark))
    }

    fn record_partition_rows(
        &mut self,
        spec: &crate::spec::Spec,
        table: &crate::data::Table,
        prep: &crate::runner::Prepared,
        ids: &crate::runner::Identities,
        mark: &SealMark,
    ) -> Result<bool> {
        let path = self.path.clone();
        let fail = |e: rusqlite::Error| migrate::refuse_or_fail(&path, e, "record partition");
        // The grid holds its memory meanwhile: a small cache, spilling to the log as it fills
        // (rows arrive in key order, so few pages are touched twice).
        self.conn
            .pragma_update(None, "cache_size", -RECORD_CACHE_KIB)
            .map_err(fail)?;
        let tx = self
            .conn
            .transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)
            .map_err(fail)?;
        let fresh = insert_partition(&tx, spec, table, prep, ids).map_err(fail)?;
        if fresh {
            // Its rules hold from now, not from its run's storing: a look at its rows through
            // another partition meanwhile follows them.
            let (rules, target, spec_hash) = seal_from(spec);
            tx.execute(
                "INSERT INTO pending_seals (partition_id, rules, target, spec_hash, sealed_at, user, host) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)",
                params![prep.partition_id, rules, target, spec_hash, mark.at, mark.user, mark.host],
            )
            .map_err(fail)?;
        }
        // Every row just written names this partition (one bound parameter), which exists.
        check_partition(&tx, &prep.partition_id)?;
        tx.commit().map_err(fail)?;
        self.fresh = fresh.then(|| (prep.partition_id.clone(), distinct(&sorted_keys(&ids.test))));
        self.conn
            .pragma_update(None, "cache_size", -CACHE_KIB)
            .map_err(fail)?;
        Ok(fresh)
    }

    /// Remove a partition that `record_partition` stored for a run that then failed, unless a
    /// run or a reveal refers to it by now.
    pub fn forget_partition(&mut self, id: &str) -> Result<()> {
        self.fresh = None;
        let path = self.path.clone();
        let fail = |e: rusqlite::Error| migrate::refuse_or_fail(&path, e, "forget partition");
        let tx = self
            .conn
            .transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)
            .map_err(fail)?;
        let used: bool = tx
            .query_row(
                "SELECT EXISTS (SELECT 1 FROM runs WHERE partition_id = ?1)
                     OR EXISTS (SELECT 1 FROM reveals WHERE partition_id = ?1)",
                [id],
                |r| r.get(0),
            )
            .map_err(fail)?;
        if !used {
            for table in ["partition_rows", "partition_identities", "pending_seals"] {
                tx.execute(
                    &format!("DELETE FROM {table} WHERE partition_id = ?1"),
                    [id],
                )
                .map_err(fail)?;
            }
            tx.execute("DELETE FROM partitions WHERE id = ?1", [id])
                .map_err(fail)?;
        }
        tx.commit().map_err(fail)
    }

    /// Every run, oldest first.
    pub fn history(&self) -> Result<Vec<RunSummary>> {
        self.history_where(&RunFilter::default())
    }

    /// The runs `filter` keeps, oldest first.
    pub fn history_where(&self, filter: &RunFilter) -> Result<Vec<RunSummary>> {
        let mut stmt = self
            .conn
            .prepare(&format!(
                "{SUMMARY_SQL} WHERE (?1 IS NULL OR r.experiment = ?1) AND (?2 IS NULL OR r.started_at >= ?2) ORDER BY r.id"
            ))
            .map_err(sql_err("list runs"))?;
        let rows = stmt
            .query_map(params![filter.experiment, filter.since], summary_row)
            .map_err(sql_err("list runs"))?;
        rows.collect::<rusqlite::Result<Vec<_>>>()
            .map_err(sql_err("list runs"))
    }

    /// The experiment names in the ledger, sorted.
    pub fn experiments(&self) -> Result<Vec<String>> {
        let mut st = self
            .conn
            .prepare("SELECT DISTINCT experiment FROM runs ORDER BY experiment")
            .map_err(sql_err("list experiments"))?;
        st.query_map([], |r| r.get(0))
            .and_then(|rows| rows.collect())
            .map_err(sql_err("list experiments"))
    }

    /// One run in full, or `None` when there is no such run.
    pub fn run(&self, id: i64) -> Result<Option<RunDetail>> {
        let summary = self
            .conn
            .query_row(&format!("{SUMMARY_SQL} WHERE r.id = ?1"), [id], summary_row)
            .optional()
            .map_err(sql_err("read run"))?;
        let Some(summary) = summary else {
            return Ok(None);
        };
        let detail = self
            .conn
            .query_row(
                "SELECT r.finished_at, r.tool_version, r.user, r.host, r.threads, r.seed, r.spec_path, r.spec_text, r.spec_hash, r.data_path,
                        r.data_rows, r.data_columns, r.rows_used, p.n_train, p.n_validation, p.n_test, r.holdout, r.rule, r.best, r.model_json, p.settings
                 FROM runs r JOIN partitions p ON p.id = r.partition_id WHERE r.id = ?1",
                [id],
                |r| {
                    Ok(RunDetail {
                        summary: summary.clone(),
                        finished_at: r.get(0)?,
                        tool_version: r.get(1)?,
                        user: r.get(2)?,
                        host: r.get(3)?,
                        threads: r.get(4)?,
                        seed: r.get(5)?,
                        spec_path: r.get(6)?,
                        spec_text: r.get(7)?,
                        spec_hash: r.get(8)?,
                        data_path: r.get(9)?,
                        data_rows: r.get(10)?,
                        data_columns: r.get(11)?,
                        rows_used: r.get(12)?,
                        n_train: r.get(13)?,
                        n_validation: r.get(14)?,
                        n_test: r.get(15)?,
                        holdout: r.get(16)?,
                        rule: r.get(17)?,
                        best: r.get(18)?,
                        model_json: r.get(19)?,
                        split_settings: r.get(20)?,
                        identity: 1,
                        folds: Vec::new(),
                        candidates: Vec::new(),
                        warnings: Vec::new(),
                        partition_runs: 0,
                        partition_candidates: 0,
                        nested: None,
                    })
                },
            )
            .map_err(sql_err("read run"))?;
        let mut d = detail;
        // The stored settings name the identity version beside the split settings.
        d.identity = settings_identity(&d.split_settings);
        d.split_settings = split_only(&d.split_settings);
        let mut st = self.conn.prepare("SELECT repeat, fold, n_fit, n_score FROM folds WHERE run_id = ?1 ORDER BY repeat, fold").map_err(sql_err("read folds"))?;
        d.folds = st
            .query_map([id], |r| {
                Ok(FoldRow {
                    repeat: r.get(0)?,
                    fold: r.get(1)?,
                    n_fit: r.get(2)?,
                    n_score: r.get(3)?,
                })
            })
            .and_then(|rows| rows.collect())
            .map_err(sql_err("read folds"))?;
        let mut st = self.conn.prepare("SELECT id, family, params, standardize, seed, failure FROM candidates WHERE run_id = ?1 ORDER BY id").map_err(sql_err("read candidates"))?;
        type Row = (i64, String, String, bool, String, Option<String>);
        let cands: Vec<Row> = st
            .query_map([id], |r| {
                Ok((
                    r.get(0)?,
                    r.get(1)?,
                    r.get(2)?,
                    r.get(3)?,
                    r.get(4)?,
                    r.get(5)?,
                ))
            })
            .and_then(|rows| rows.collect())
            .map_err(sql_err("read candidates"))?;
        let mut st = self.conn.prepare("SELECT candidate, part, metric, mean, se FROM scores WHERE run_id = ?1 ORDER BY candidate, part, metric").map_err(sql_err("read scores"))?;
        // Rows come in candidate order, each candidate's parts in turn: one map per (candidate,
        // part), in that order, matched to the candidates (also in id order) as they go.
        let mut stats: Vec<(i64, bool, BTreeMap<String, Stat>)> = Vec::new();
        let mut rows = st.query([id]).map_err(sql_err("read scores"))?;
        while let Some(r) = rows.next().map_err(sql_err("read scores"))? {
            let c: i64 = r.get(0).map_err(sql_err("read scores"))?;
            let train = match r.get_ref(1).map_err(sql_err("read scores"))? {
                ValueRef::Text(b"train") => true,
                ValueRef::Text(b"validation") => false,
                _ => continue,
            };
            let metric: String = r.get(2).map_err(sql_err("read scores"))?;
            let stat = Stat {
                mean: r.get(3).map_err(sql_err("read scores"))?,
                se: r.get(4).map_err(sql_err("read scores"))?,
            };
            match stats.last_mut() {
                Some((lc, lt, m)) if *lc == c && *lt == train => {
                    m.insert(metric, stat);
                }
                _ => stats.push((c, train, BTreeMap::from([(metric, stat)]))),
            }
        }
        let mut stats = stats.into_iter().peekable();
        for (cid, family, params, standardize, seed, failure) in cands {
            // Scores of candidates that are not listed (none, in a ledger this code wrote).
            while stats.next_if(|(c, _, _)| *c < cid).is_some() {}
            let mut part = |train: bool| {
                stats
                    .next_if(|(c, t, _)| *c == cid && *t == train)
                    .map(|(_, _, m)| m)
                    .unwrap_or_default()
            };
            let train = part(true);
            let validation = part(false);
            d.candidates.push(CandidateRow {
                id: cid,
                failure,
                family,
                params: serde_json::from_str(&params).unwrap_or(Value::Null),
                standardize,
                seed,
                train,
                validation,
            });
        }
        let mut st = self
            .conn
            .prepare("SELECT message FROM warnings WHERE run_id = ?1 ORDER BY seq")
            .map_err(sql_err("read warnings"))?;
        d.warnings = st
            .query_map([id], |r| r.get(0))
            .and_then(|rows| rows.collect())
            .map_err(sql_err("read warnings"))?;
        let (runs, cands) = self.partition_usage(&d.summary.partition_id, id)?;
        d.partition_runs = runs;
        d.partition_candidates = cands;
        d.nested = self
            .conn
            .query_row("SELECT metric, estimate, se, outer_folds, selections FROM nested WHERE run_id = ?1", [id], |r| {
                Ok(NestedRow {
                    metric: r.get(0)?,
                    estimate: r.get(1)?,
                    se: r.get(2)?,
                    outer_folds: r.get(3)?,
                    selections: serde_json::from_str(&r.get::<_, String>(4)?).unwrap_or(Value::Null),
                })
            })
            .optional()
            .map_err(sql_err("read nested"))?;
        Ok(Some(d))
    }

    /// Row counts of every table, to show that a failed command changed nothing.
    pub fn counts(&self) -> Result<BTreeMap<String, i64>> {
        let mut out = BTreeMap::new();
        for t in [
            "partitions",
            "partition_rows",
            "partition_identities",
            "run_identities",
            "runs",
            "folds",
            "candidates",
            "fold_scores",
            "scores",
            "warnings",
            "reveals",
            "reveal_scores",
            "nested",
            "replays",
            "notes",
            "chain",
            "run_starts",
            "uses",
        ] {
            let n: i64 = self
                .conn
                .query_row(&format!("SELECT count(*) FROM {t}"), [], |r| r.get(0))
                .map_err(sql_err("count rows"))?;
            out.insert(t.to_string(), n);
        }
        Ok(out)
    }

    /// Every fold score of a run: (candidate, (repeat, fold, part, metric, value)), in primary
    /// key order.
    pub fn run_fold_scores(&self, run: i64) -> Result<Vec<(i64, FoldScore)>> {
        let mut st = self
            .conn
            .prepare("SELECT candidate, repeat, fold, part, metric, value FROM fold_scores WHERE run_id = ?1 ORDER BY candidate, repeat, fold, part, metric")
            .map_err(sql_err("read fold scores"))?;
        st.query_map([run], |r| {
            Ok((
                r.get(0)?,
                (r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?, r.get(5)?),
            ))
        })
        .and_then(|rows| rows.collect())
        .map_err(sql_err("read fold scores"))
    }

    /// Per-fold scores of one candidate, in (repeat, fold, part, metric) order.
    pub fn fold_scores(&self, run: i64, candidate: i64) -> Result<Vec<FoldScore>> {
        let mut st = self
            .conn
            .prepare("SELECT repeat, fold, part, metric, value FROM fold_scores WHERE run_id = ?1 AND candidate = ?2 ORDER BY repeat, fold, part, metric")
            .map_err(sql_err("read fold scores"))?;
        st.query_map([run, candidate], |r| {
            Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?))
        })
        .and_then(|rows| rows.collect())
        .map_err(sql_err("read fold scores"))
    }
}

/// One metric of a reveal: (metric, value, low, high, bootstrap se).
pub type RevealScore = (String, Option<f64>, Option<f64>, Option<f64>, Option<f64>);

/// A reveal to store (built by `guard::consult`).
pub use crate::guard::consult::Record as RevealRecord;

/// One partition in `audit`.
#[derive(Debug, Clone)]
pub struct PartitionAudit {
    pub id: String,
    pub experiments: Vec<String>,
    pub test_rows: i64,
    /// Its consultations so far: reveals, development uses, mechanism state.
    pub history: crate::guard::History,
    /// The rules it was sealed with.
    pub seal: crate::guard::consult::Seal,
    pub people: Vec<String>,
    pub first: Option<String>,
    pub last: Option<String>,
    /// The optimism JSON of the last reveal.
    pub optimism: Option<String>,
}

impl Ledger {
    /// Earlier consultations of a partition: reveals, distinct candidates, mechanism state,
    /// development uses.
    pub fn partition_history(&self, partition: &str) -> Result<crate::guard::History> {
        history_of(&self.conn, partition)
    }

    /// The rules `partition` was sealed with.
    pub fn seal(&self, partition: &str) -> Result<crate::guard::consult::Seal> {
        seal_of(&self.conn, partition)
    }

    /// The ids of every stored partition, in order: taken before the partitions a
    /// consultation touches are found, and compared inside its transaction (`consult`).
    pub fn partitions_seen(&self) -> Result<Vec<String>> {
        partition_ids(&self.conn)
    }

    /// Consult sealed partitions: their seals and histories are read inside one write
    /// transaction, `decide` builds the records from them, and the records are stored and
    /// chained before the transaction commits. Two consultations at once are serialised, so each
    /// sees the other's record (positions, budgets and mechanism states never race). Returns
    /// the new reveal ids, in `decide`'s order, and what `decide` returned beside the records;
    /// or `None`, with nothing written, when the stored partitions are no longer `seen` (one
    /// was stored since the caller found which partitions its rows touch: find them again).
    pub fn consult<T>(
        &mut self,
        seen: &[String],
        partitions: &[String],
        decide: impl FnOnce(
            &[(crate::guard::consult::Seal, crate::guard::History)],
        ) -> Result<(Vec<RevealRecord>, T)>,
    ) -> Result<Option<(Vec<i64>, T)>> {
        let path = self.path.clone();
        let fail = |e: rusqlite::Error| migrate::refuse_or_fail(&path, e, "write reveal");
        let tx = self
            .conn
            .transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)
            .map_err(fail)?;
        if partition_ids(&tx)? != seen {
            return Ok(None);
        }
        let mut states = Vec::with_capacity(partitions.len());
        for p in partitions {
            states.push((seal_of(&tx, p)?, history_of(&tx, p)?));
        }
        let (records, out) = decide(&states)?;
        let mut ids = Vec::with_capacity(records.len());
        for r in &records {
            let mark = SealMark {
                at: &r.revealed_at,
                user: &r.user,
                host: &r.host,
            };
            settle_seal(&tx, &r.partition_id, None, &mark)?;
        }
        for r in &records {
            ids.push(insert_reveal(&tx, r).map_err(fail)?);
        }
        for id in &ids {
            chain::append(&tx, "reveal", *id, None)?;
        }
        crate::failpoint::pause("reveal:commit");
        tx.commit().map_err(fail)?;
        Ok(Some((ids, out)))
    }

    /// How other partitions' consultations exposed a run's test rows (for `run` and
    /// `reveal`): how many of them are test rows of a consulted partition other than its own,
    /// the most consultations (reveals and development uses) of any partition holding one of
    /// them, and the time of the last (`test_overlaps` finds the rows).
    pub fn exposure(
        &self,
        table: &crate::data::Table,
        prep: &crate::runner::Prepared,
    ) -> Result<crate::guard::consult::Exposure> {
        let err = || sql_err("read exposure");
        let mut st = self
            .conn
            .prepare(
                "SELECT partition_id, count(*), max(at) FROM (
                     SELECT partition_id, revealed_at AS at FROM reveals
                     UNION ALL SELECT u.partition_id, r.finished_at FROM uses u JOIN runs r ON r.id = u.run_id)
                 WHERE partition_id IS NOT ?1 GROUP BY partition_id ORDER BY partition_id",
            )
            .map_err(err())?;
        let consulted: Vec<(String, i64, String)> = st
            .query_map([&prep.partition_id], |r| {
                Ok((r.get(0)?, r.get(1)?, r.get(2)?))
            })
            .and_then(|rows| rows.collect())
            .map_err(err())?;
        let mut e = crate::guard::consult::Exposure::default();
        if consulted.is_empty() {
            return Ok(e);
        }
        let test = membership(prep.rows.len(), &prep.sealed.test_members());
        let mut most = vec![0i64; prep.rows.len()];
        let hits = test_overlaps(&self.conn, table, prep, |id| {
            consulted.binary_search_by(|c| c.0.as_str().cmp(id)).is_ok()
        })?;
        for (id, at) in hits {
            let Ok(c) = consulted.binary_search_by(|c| c.0.as_str().cmp(&id)) else {
                continue;
            };
            let (_, n, last) = &consulted[c];
            let mut any = false;
            for i in at.into_iter().filter(|&i| test[i]) {
                most[i] = most[i].max(*n);
                any = true;
            }
            if any && *last > e.last {
                e.last = last.clone();
            }
        }
        e.rows = most.iter().filter(|m| **m > 0).count();
        e.most = most.iter().copied().max().unwrap_or(0);
        Ok(e)
    }

    /// Other partitions whose test rows are test rows of this run's partition too, with how
    /// many: a reveal here is a look at those rows of theirs as well.
    pub fn test_partners(
        &self,
        table: &crate::data::Table,
        prep: &crate::runner::Prepared,
    ) -> Result<Vec<(String, usize)>> {
        let test = membership(prep.rows.len(), &prep.sealed.test_members());
        Ok(test_overlaps(&self.conn, table, prep, |_| true)?
            .into_iter()
            .map(|(id, at)| (id, at.into_iter().filter(|&i| test[i]).count()))
            .filter(|(_, n)| *n > 0)
            .collect())
    }

    /// The recipe of a stored version-3 partition (`None` for an older one or none).
    pub fn partition_recipe(
        &self,
        partition: &str,
    ) -> Result<Option<crate::data::identity::Recipe>> {
        let parts = rows::stored(&self.conn, |p| p.id == partition)?;
        Ok(parts.into_iter().next().and_then(|p| p.recipe))
    }

    /// The identity version of a stored partition (`None` when it is not stored).
    pub fn partition_identity(&self, partition: &str) -> Result<Option<crate::data::Identity>> {
        let settings: Option<String> = self
            .conn
            .query_row(
                "SELECT settings FROM partitions WHERE id = ?1",
                [partition],
                |r| r.get(0),
            )
            .optional()
            .map_err(sql_err("read identity version"))?;
        Ok(settings.and_then(|s| crate::data::Identity::of_number(settings_identity(&s))))
    }

    /// True when any consultation is stored (exposure checks are skipped otherwise).
    pub fn has_reveals(&self) -> Result<bool> {
        self.conn
            .query_row(
                "SELECT EXISTS (SELECT 1 FROM reveals) OR EXISTS (SELECT 1 FROM uses)",
                [],
                |r| r.get(0),
            )
            .map_err(sql_err("count reveals"))
    }

    /// For each stored partition holding some of `rows` of a file to predict among its test
    /// rows: which of them (positions into `rows`), compared as `rows::predicted` says.
    /// `key` is the model's key column (for partitions of identity versions 1 and 2).
    pub fn sealed_rows(
        &self,
        table: &crate::data::Table,
        rows: &[usize],
        key: Option<usize>,
        model: &rows::Predictor,
    ) -> Result<Vec<(String, Vec<usize>)>> {
        let parts = rows::stored(&self.conn, |_| true)?;
        let mut ids = rows::TableIds::new(table, rows, key, None);
        rows::predicted(&self.conn, &mut ids, &parts, model)
    }

    /// A run's own recipe and its partition's test rows' identities under it, when the run
    /// stored them (its features differ from its partition's recipe).
    pub fn run_identities(
        &self,
        run: i64,
    ) -> Result<Option<(crate::data::identity::Recipe, Vec<crate::data::RowKey>)>> {
        rows::run_ids(&self.conn, run)
    }

    /// The stored partitions other than the run's own whose test rows the run develops on,
    /// each with its seal and history (refusals are decided by `guard::consult::development`).
    /// A partition of the same data file is compared by row position (exact, whatever rows
    /// look alike); one of another file by row identity (the rows of an edited or grown file).
    pub fn development_overlaps(
        &self,
        table: &crate::data::Table,
        prep: &crate::runner::Prepared,
    ) -> Result<Vec<crate::guard::consult::Overlapping>> {
        development_overlaps(&self.conn, table, prep)
    }

    /// The test-row identities of a partition.
    pub fn partition_row_keys(&self, partition: &str) -> Result<Vec<crate::data::RowKey>> {
        let mut st = self
            .conn
            .prepare("SELECT row_key FROM partition_rows WHERE partition_id = ?1")
            .map_err(sql_err("read partition rows"))?;
        let rows: Vec<Vec<u8>> = st
            .query_map([partition], |r| r.get(0))
            .and_then(|rows| rows.collect())
            .map_err(sql_err("read partition rows"))?;
        Ok(rows
            .into_iter()
            .filter_map(|k| <crate::data::RowKey>::try_from(k.as_slice()).ok())
            .collect())
    }

    /// Runs and candidates evaluated on a development partition across the ledger, up to and
    /// including run `up_to`.
    pub fn partition_usage(&self, partition: &str, up_to: i64) -> Result<(i64, i64)> {
        self.conn
            .query_row(
                "SELECT count(DISTINCT r.id), count(c.id) FROM runs r JOIN candidates c ON c.run_id = r.id WHERE r.partition_id = ?1 AND r.id <= ?2",
                params![partition, up_to],
                |r| Ok((r.get(0)?, r.get(1)?)),
            )
            .map_err(sql_err("count partition use"))
    }

    /// One entry per partition, oldest first.
    pub fn audit(&self) -> Result<Vec<PartitionAudit>> {
        let mut st = self
            .conn
            .prepare("SELECT id, n_test FROM partitions ORDER BY rowid")
            .map_err(sql_err("audit"))?;
        let parts: Vec<(String, i64)> = st
            .query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
            .and_then(|rows| rows.collect())
            .map_err(sql_err("audit"))?;
        let mut out = Vec::new();
        for (id, test_rows) in parts {
            let q = |sql: &str| -> Result<Vec<String>> {
                let mut st = self.conn.prepare(sql).map_err(sql_err("audit"))?;
                st.query_map([&id], |r| r.get(0))
                    .and_then(|rows| rows.collect())
                    .map_err(sql_err("audit"))
            };
            let experiments = q(
                "SELECT DISTINCT experiment FROM runs WHERE partition_id = ?1 ORDER BY experiment",
            )?;
            let people =
                q("SELECT DISTINCT user FROM reveals WHERE partition_id = ?1 ORDER BY user")?;
            let (first, last): (Option<String>, Option<String>) = self
                .conn
                .query_row(
                    "SELECT min(revealed_at), max(revealed_at) FROM reveals WHERE partition_id = ?1",
                    [&id],
                    |r| Ok((r.get(0)?, r.get(1)?)),
                )
                .map_err(sql_err("audit"))?;
            let optimism: Option<String> = self
                .conn
                .query_row(
                    "SELECT optimism FROM reveals WHERE partition_id = ?1 ORDER BY id DESC LIMIT 1",
                    [&id],
                    |r| r.get(0),
                )
                .optional()
                .map_err(sql_err("audit"))?;
            out.push(PartitionAudit {
                history: history_of(&self.conn, &id)?,
                seal: seal_of(&self.conn, &id)?,
                id,
                experiments,
                test_rows,
                people,
                first,
                last,
                optimism,
            });
        }
        Ok(out)
    }

    /// The reveals of a run's partition, oldest first: (id, run, candidate, when, user, answer kind, answer).
    pub fn reveals_of_partition(&self, partition: &str) -> Result<Vec<RevealSummary>> {
        let mut st = self
            .conn
            .prepare("SELECT id, run_id, candidate, revealed_at, user, source, mode, metric, answer_kind, answer FROM reveals WHERE partition_id = ?1 ORDER BY id")
            .map_err(sql_err("read reveals"))?;
        st.query_map([partition], |r| {
            Ok(RevealSummary {
                id: r.get(0)?,
                run: r.get(1)?,
                candidate: r.get(2)?,
                at: r.get(3)?,
                user: r.get(4)?,
                source: r.get(5)?,
                mode: r.get(6)?,
                metric: r.get(7)?,
                answer_kind: r.get(8)?,
                answer: r.get(9)?,
            })
        })
        .and_then(|rows| rows.collect())
        .map_err(sql_err("read reveals"))
    }
}

/// A replay record: (replay run, run replayed, identical, values compared, values differing).
pub type ReplayRow = (i64, i64, bool, i64, i64);

/// One reveal as the reveals plot draws it.
#[derive(Debug, Clone)]
pub struct RevealPoint {
    pub reveal: RevealSummary,
    /// The test score of the reveal's metric as released: exact in `count` mode; the
    /// mechanism's answer in `ladder` and `reusable` (the exact score stays unread).
    pub test: Option<f64>,
    /// The revealed candidate's cross-validated (development) estimate of that metric.
    pub development: Option<f64>,
    /// The optimism estimate shown with the reveal, in the metric's units.
    pub optimism: Option<f64>,
}

impl Ledger {
    /// Replays involving `run`: (replay run, the run it replays, identical, compared, differing),
    /// the replays of it and, if it is itself a replay, its own record; oldest first.
    pub fn replays_involving(&self, run: i64) -> Result<Vec<ReplayRow>> {
        let mut st = self
            .conn
            .prepare("SELECT run_id, replay_of, identical, compared, differing FROM replays WHERE replay_of = ?1 OR run_id = ?1 ORDER BY run_id")
            .map_err(sql_err("read replays"))?;
        st.query_map([run], |r| {
            Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?))
        })
        .and_then(|rows| rows.collect())
        .map_err(sql_err("read replays"))
    }

    /// The digest of a run's refitted model's predictions on the development rows.
    pub fn predictions_digest(&self, run: i64) -> Result<Option<String>> {
        self.conn
            .query_row(
                "SELECT predictions_digest FROM runs WHERE id = ?1",
                [run],
                |r| r.get(0),
            )
            .map_err(sql_err("read run"))
    }

    /// A run's link in the hash chain: (position, entry hash); `None` before it is chained.
    pub fn run_chain_entry(&self, run: i64) -> Result<Option<(i64, String)>> {
        self.conn
            .query_row(
                "SELECT seq, entry_hash FROM chain WHERE kind = 'run' AND ref_id = ?1",
                [run],
                |r| Ok((r.get(0)?, r.get(1)?)),
            )
            .optional()
            .map_err(sql_err("read chain"))
    }

    /// Every reveal of a partition, oldest first, with its test score, the development estimate
    /// of the candidate revealed, and the optimism estimate shown.
    pub fn reveal_points(&self, partition: &str) -> Result<Vec<RevealPoint>> {
        let reveals = self.reveals_of_partition(partition)?;
        let mut out = Vec::with_capacity(reveals.len());
        for r in reveals {
            let (test, development, optimism): (Option<f64>, Option<f64>, String) = self
                .conn
                .query_row(
                    "SELECT (SELECT value FROM reveal_scores WHERE reveal_id = v.id AND metric = v.metric),
                            (SELECT mean FROM scores WHERE run_id = v.run_id AND candidate = v.candidate AND part = 'validation' AND metric = v.metric),
                            v.optimism
                     FROM reveals v WHERE v.id = ?1",
                    [r.id],
                    |row| Ok((row.get(0)?, row.get(1)?, row.get(2)?)),
                )
                .map_err(sql_err("read reveal"))?;
            let optimism = serde_json::from_str::<Value>(&optimism)
                .ok()
                .and_then(|v| v["estimate"].as_f64());
            // Under a mechanism only its answer was released: the exact score stays in the
            // ledger and reaches no listing, plot or report.
            let test = if r.mode == "count" { test } else { r.answer };
            out.push(RevealPoint {
                reveal: r,
                test,
                development,
                optimism,
            });
        }
        Ok(out)
    }

    /// Test rows of consulted partitions that are test rows of other partitions too: one
    /// sentence each. Partitions of the same data file are compared by row position; others
    /// by stored identity (which meet only within one identity version and recipe).
    /// (Development uses are listed with their partitions.)
    pub fn overlap_findings(&self) -> Result<Vec<String>> {
        let err = || sql_err("find overlaps");
        // Every partition's data file, and for the consulted ones their assignment.
        let files: BTreeMap<String, String> = {
            let mut st = self
                .conn
                .prepare("SELECT id, data_sha256 FROM partitions")
                .map_err(err())?;
            st.query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
                .and_then(|rows| rows.collect())
                .map_err(err())?
        };
        let revealed: Vec<String> = {
            let mut st = self
                .conn
                .prepare(
                    "SELECT partition_id FROM reveals UNION SELECT u.partition_id FROM uses u
                     JOIN partitions p ON p.id = u.partition_id ORDER BY 1",
                )
                .map_err(err())?;
            st.query_map([], |r| r.get(0))
                .and_then(|rows| rows.collect())
                .map_err(err())?
        };
        let file = |id: &str| files.get(id).map(String::as_str);
        let mut shared: BTreeMap<(usize, String), i64> = BTreeMap::new();
        // Partitions of the same data file share rows by position, whatever their identities.
        let assignment = |id: &str| -> Result<Vec<u8>> {
            self.conn
                .query_row(
                    "SELECT assignment FROM partitions WHERE id = ?1",
                    [id],
                    |r| r.get(0),
                )
                .map_err(err())
        };
        let test = Part::Test.code();
        for (a, id) in revealed.iter().enumerate() {
            let mine = assignment(id)?;
            for (other, _) in files
                .iter()
                .filter(|(o, f)| *o != id && Some(f.as_str()) == file(id))
            {
                let theirs = assignment(other)?;
                let n = mine
                    .iter()
                    .zip(&theirs)
                    .filter(|(x, y)| **x == test && **y == test)
                    .count() as i64;
                if n > 0 {
                    shared.insert((a, other.clone()), n);
                }
            }
        }
        // Other files: the identities of every consulted partition, then one pass over all
        // stored test rows (in primary-key order) counts, per pair, the rows they share.
        // (identity, index in `revealed`), sorted: the revealed partitions holding a row.
        let mut index: Vec<(crate::data::RowKey, usize)> = Vec::new();
        for (a, id) in revealed.iter().enumerate() {
            index.extend(self.partition_row_keys(id)?.into_iter().map(|k| (k, a)));
        }
        index.sort_unstable();
        if !index.is_empty() {
            let mut st = self
                .conn
                .prepare("SELECT partition_id, row_key FROM partition_rows ORDER BY partition_id, row_key")
                .map_err(err())?;
            let mut rows = st.query([]).map_err(err())?;
            while let Some(row) = rows.next().map_err(err())? {
                let Ok(key) = row.get_ref(1).map_err(err())?.as_blob() else {
                    continue;
                };
                let from = index.partition_point(|(k, _)| k[..] < *key);
                let holders = index[from..].iter().take_while(|(k, _)| k[..] == *key);
                let mut b: Option<String> = None;
                for &(_, a) in holders {
                    let b = match &b {
                        Some(b) => b,
                        None => b.insert(row.get(0).map_err(err())?),
                    };
                    if file(&revealed[a]) != file(b) {
                        *shared.entry((a, b.clone())).or_insert(0) += 1;
                    }
                }
            }
        }
        let out: Vec<String> = shared
            .into_iter()
            .map(|((a, b), n)| {
                format!(
                    "{n} test rows of consulted partition {} are also test rows of partition {b}: its test score is not fresh",
                    revealed[a]
                )
            })
            .collect();
        Ok(out)
    }
}

/// A stored reveal, briefly.
#[derive(Debug, Clone)]
pub struct RevealSummary {
    pub id: i64,
    pub run: i64,
    pub candidate: i64,
    pub at: String,
    pub user: String,
    pub source: String,
    pub mode: String,
    pub metric: String,
    pub answer_kind: String,
    pub answer: Option<f64>,
}

const SUMMARY_SQL: &str = "SELECT r.id, r.experiment, r.started_at, r.status, r.data_sha256, r.partition_id,
        (SELECT count(*) FROM candidates c WHERE c.run_id = r.id), r.metric, r.selected,
        (SELECT family FROM candidates c WHERE c.run_id = r.id AND c.id = r.selected),
        (SELECT params FROM candidates c WHERE c.run_id = r.id AND c.id = r.selected),
        (SELECT mean FROM scores s WHERE s.run_id = r.id AND s.candidate = r.selected AND s.part = 'validation' AND s.metric = r.metric),
        r.note
    FROM runs r";

fn summary_row(r: &rusqlite::Row) -> rusqlite::Result<RunSummary> {
    let params: Option<String> = r.get(10)?;
    Ok(RunSummary {
        id: r.get(0)?,
        experiment: r.get(1)?,
        started_at: r.get(2)?,
        status: r.get(3)?,
        data_sha256: r.get(4)?,
        partition_id: r.get(5)?,
        candidates: r.get(6)?,
        metric: r.get(7)?,
        selected: r.get(8)?,
        selected_family: r.get::<_, Option<String>>(9)?.unwrap_or_default(),
        selected_params: params
            .and_then(|p| serde_json::from_str(&p).ok())
            .unwrap_or(Value::Null),
        selected_score: r.get(11)?,
        note: r.get(12)?,
    })
}

/// Where the ledger is: an explicit path, else `.probity/ledger.sqlite` in the nearest folder
/// at or above `cwd` that has a `.probity` folder, else (to create) `cwd/.probity/ledger.sqlite`.
/// Returns the path and whether it was found rather than defaulted.
pub fn locate(explicit: Option<&Path>, cwd: &Path) -> (PathBuf, bool) {
    if let Some(p) = explicit {
        return (p.to_path_buf(), true);
    }
    let mut dir = Some(cwd);
    while let Some(d) = dir {
        let cand = d.join(".probity");
        if cand.is_dir() {
            return (cand.join("ledger.sqlite"), true);
        }
        dir = d.parent();
    }
    (cwd.join(".probity").join("ledger.sqlite"), false)
}

impl Ledger {
    /// Verify the chain: (entries checked, problems found).
    pub fn verify(&self) -> Result<(usize, Vec<chain::Break>)> {
        let (entries, mut breaks) = chain::verify(&self.conn)?;
        breaks.extend(orphans(&self.conn)?);
        Ok((entries, breaks))
    }

    /// The chain's head hash.
    pub fn head(&self) -> Result<String> {
        chain::head(&self.conn)
    }

    /// Append a note to a run, as its own chained entry; returns the note id.
    pub fn write_note(&mut self, run: i64, at: &str, user: &str, text: &str) -> Result<i64> {
        check_note(text)?;
        let path = self.path.clone();
        let fail = |e: rusqlite::Error| migrate::refuse_or_fail(&path, e, "write note");
        let tx = self
            .conn
            .transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)
            .map_err(fail)?;
        tx.execute(
            "INSERT INTO notes (run_id, written_at, user, text) VALUES (?1, ?2, ?3, ?4)",
            params![run, at, user, text],
        )
        .map_err(fail)?;
        let id = tx.last_insert_rowid();
        chain::append(&tx, "note", id, None)?;
        tx.commit().map_err(fail)?;
        Ok(id)
    }

    /// Notes on a run: (when, who, text), oldest first.
    pub fn notes(&self, run: i64) -> Result<Vec<(String, String, String)>> {
        let mut st = self
            .conn
            .prepare("SELECT written_at, user, text FROM notes WHERE run_id = ?1 ORDER BY id")
            .map_err(sql_err("read notes"))?;
        st.query_map([run], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))
            .and_then(|rows| rows.collect())
            .map_err(sql_err("read notes"))
    }

    /// The input files fingerprinted with a run: (path as written, SHA-256).
    /// Whether run `run` came from another ledger (merged from a bundle), or replays one that
    /// did (a replay repeats the run it replays, command and all).
    pub fn run_merged(&self, run: i64) -> Result<bool> {
        let mut at = Some(run);
        let mut seen = Vec::new();
        while let Some(id) = at {
            if seen.contains(&id) {
                break;
            }
            seen.push(id);
            let (merged, replay_of): (bool, Option<i64>) = self
                .conn
                .query_row(
                    "SELECT EXISTS (SELECT 1 FROM chain WHERE kind = 'run' AND ref_id = ?1 AND origin IS NOT NULL),
                            (SELECT replay_of FROM runs WHERE id = ?1)",
                    [id],
                    |r| Ok((r.get(0)?, r.get(1)?)),
                )
                .map_err(sql_err("read run origin"))?;
            if merged {
                return Ok(true);
            }
            at = replay_of;
        }
        Ok(false)
    }

    pub fn run_inputs(&self, run: i64) -> Result<Vec<(String, String)>> {
        let mut st = self
            .conn
            .prepare("SELECT path, sha256 FROM run_inputs WHERE run_id = ?1 ORDER BY path")
            .map_err(sql_err("read inputs"))?;
        st.query_map([run], |r| Ok((r.get(0)?, r.get(1)?)))
            .and_then(|rows| rows.collect())
            .map_err(sql_err("read inputs"))
    }

    /// Build facts of a run: (tool version, tool commit, target triple, threads).
    pub fn provenance(&self, run: i64) -> Result<(String, String, String, i64, Option<i64>)> {
        self.conn
            .query_row("SELECT tool_version, tool_commit, target_triple, threads, replay_of FROM runs WHERE id = ?1", [run], |r| {
                Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?))
            })
            .map_err(sql_err("read provenance"))
    }
}

/// The page cache of a connection, and of `record_partition`'s transaction (KiB).
const CACHE_KIB: i64 = 65536;
const RECORD_CACHE_KIB: i64 = 2048;

/// Rows that refer to a row that is not there, over the whole ledger (SQLite's own check of
/// every foreign key): one break per table and missing parent table, `kind` naming the table
/// and `id` counting its rows. probity never leaves such rows; a hand edit can.
fn orphans(conn: &Connection) -> Result<Vec<chain::Break>> {
    let mut st = conn
        .prepare("PRAGMA foreign_key_check")
        .map_err(sql_err("check references"))?;
    let mut found: BTreeMap<(String, String), i64> = BTreeMap::new();
    let mut rows = st.query([]).map_err(sql_err("check references"))?;
    while let Some(r) = rows.next().map_err(sql_err("check references"))? {
        let table: String = r.get(0).map_err(sql_err("check references"))?;
        let parent: String = r.get(2).map_err(sql_err("check references"))?;
        *found.entry((table, parent)).or_default() += 1;
    }
    Ok(found
        .into_iter()
        .map(|((table, parent), n)| chain::Break {
            seq: None,
            kind: table.clone(),
            id: n,
            what: format!(
                "{n} row(s) of {table} refer to a row of {parent} that is not there (removed or inserted outside probity)"
            ),
        })
        .collect())
}

/// A reference the bulk writes checked and found missing: a bug, never the user's doing.
fn dangling(what: String) -> Error {
    Error::Internal(format!("{what}; nothing was recorded"))
}

fn check_partition(tx: &rusqlite::Transaction, id: &str) -> Result<()> {
    let n: i64 = tx
        .query_row("SELECT count(*) FROM partitions WHERE id = ?1", [id], |r| {
            r.get(0)
        })
        .map_err(sql_err("check references"))?;
    if n != 1 {
        return Err(dangling(format!("partition {id} is missing")));
    }
    Ok(())
}

/// The references of a run's rows, checked with indexed queries (none reads every score row).
/// Rows keyed by the run (folds, candidates, warnings, inputs, nested, replays) name it through
/// one bound parameter, and its row exists; what remains is the run's partition and the run it
/// replays, and that every score names one of the run's candidates: the candidates hold ids
/// 1..=n, and the score tables' smallest and largest candidate lie in that range.
/// `partition` and `replay_of` are the values the run's row was written with (reading
/// `replay_of` back would read past the stored model, megabytes for a knn run).
fn check_run_references(
    tx: &rusqlite::Transaction,
    run: i64,
    partition: &str,
    replay_of: Option<i64>,
) -> Result<()> {
    check_partition(tx, partition)?;
    if let Some(of) = replay_of {
        let n: i64 = tx
            .query_row("SELECT count(*) FROM runs WHERE id = ?1", [of], |r| {
                r.get(0)
            })
            .map_err(sql_err("check references"))?;
        if n != 1 {
            return Err(dangling(format!(
                "run {run} replays run {of}, which is missing"
            )));
        }
    }
    let (n, low, high): (i64, Option<i64>, Option<i64>) = tx
        .query_row(
            "SELECT count(*), min(id), max(id) FROM candidates WHERE run_id = ?1",
            [run],
            |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)),
        )
        .map_err(sql_err("check references"))?;
    if n > 0 && (low != Some(1) || high != Some(n)) {
        return Err(dangling(format!(
            "run {run}'s {n} candidates are not numbered 1 to {n}"
        )));
    }
    for t in ["fold_scores", "scores"] {
        let (low, high): (Option<i64>, Option<i64>) = tx
            .query_row(
                &format!(
                    "SELECT (SELECT min(candidate) FROM {t} WHERE run_id = ?1), (SELECT max(candidate) FROM {t} WHERE run_id = ?1)"
                ),
                [run],
                |r| Ok((r.get(0)?, r.get(1)?)),
            )
            .map_err(sql_err("check references"))?;
        if let (Some(low), Some(high)) = (low, high)
            && (low < 1 || high > n)
        {
            return Err(dangling(format!(
                "run {run}'s {t} name candidates {low} to {high}, but it has {n}"
            )));
        }
    }
    Ok(())
}

/// A bitmap over `n` positions marking `members`.
/// The ids of every stored partition, in order.
fn partition_ids(conn: &Connection) -> Result<Vec<String>> {
    let err = || sql_err("list partitions");
    let mut st = conn
        .prepare_cached("SELECT id FROM partitions ORDER BY id")
        .map_err(err())?;
    st.query_map([], |r| r.get(0))
        .and_then(|rows| rows.collect())
        .map_err(err())
}

fn membership(n: usize, members: &[usize]) -> Vec<bool> {
    let mut m = vec![false; n];
    for &i in members {
        if let Some(x) = m.get_mut(i) {
            *x = true;
        }
    }
    m
}

/// Stored partitions (other than the run's own, and those `keep` keeps, by id) whose test rows
/// are rows of this run's table, with the kept positions (indices into `prep.rows`) of those
/// rows. The same data file: by position, exact whatever rows look alike. Another file (an
/// edited, grown or reshaped copy): by identity, all the kept rows judged together
/// (`rows::run_overlaps`).
fn test_overlaps(
    conn: &Connection,
    table: &crate::data::Table,
    prep: &crate::runner::Prepared,
    keep: impl Fn(&str) -> bool,
) -> Result<Vec<(String, Vec<usize>)>> {
    let err = || sql_err("find overlapping partitions");
    let own = prep.partition_id.as_str();
    let others = rows::stored(conn, |p| p.id != own && p.n_test > 0 && keep(&p.id))?;
    let mut out = Vec::new();
    let mut st = conn
        .prepare("SELECT assignment FROM partitions WHERE id = ?1")
        .map_err(err())?;
    for p in others.iter().filter(|p| p.data_sha256 == table.sha256) {
        let assignment: Vec<u8> = st.query_row([&p.id], |r| r.get(0)).map_err(err())?;
        let at: Vec<usize> = (0..prep.rows.len())
            .filter(|&i| assignment.get(prep.rows[i]) == Some(&Part::Test.code()))
            .collect();
        if !at.is_empty() {
            out.push((p.id.clone(), at));
        }
    }
    let elsewhere: Vec<rows::Stored> = others
        .into_iter()
        .filter(|p| p.data_sha256 != table.sha256)
        .collect();
    if !elsewhere.is_empty() {
        let mut ids = rows::TableIds::new(table, &prep.rows, prep.key, Some(prep.target_column));
        out.extend(rows::run_overlaps(conn, &mut ids, &elsewhere)?);
        out.sort();
    }
    Ok(out)
}

/// See `Ledger::development_overlaps`.
fn development_overlaps(
    conn: &Connection,
    table: &crate::data::Table,
    prep: &crate::runner::Prepared,
) -> Result<Vec<crate::guard::consult::Overlapping>> {
    let dev = membership(prep.rows.len(), &prep.sealed.development());
    // The columns this run reads: its target and its features.
    let name = |c: usize| crate::data::identity::normalise(&table.columns[c].name);
    let mut reads: Vec<String> = prep.features.iter().map(|&c| name(c)).collect();
    reads.push(name(prep.target_column));
    let mut out = Vec::new();
    for (partition, at) in overlaps_under_sealed_targets(conn, table, prep)? {
        let at: Vec<usize> = at.into_iter().filter(|&i| dev[i]).collect();
        let rows = at.len();
        if rows == 0 {
            continue;
        }
        let seal = seal_of(conn, &partition)?;
        // A run that reads the partition's target neither as its target nor as a feature sees
        // no sealed target, unless its own target is that target in another form: under
        // another name (the file lacks the sealed one, or holds something else under its
        // name), rescaled or relabelled (it follows the sealed one on these rows).
        let mut because = None;
        if let Some(t) = seal.target.as_deref()
            && !reads.contains(&crate::data::identity::normalise(t))
        {
            let mine = &table.columns[prep.target_column].name;
            let seen = target_seen(conn, table, prep, &partition, t, &at)?;
            match crate::guard::consult::another_target(t, mine, &seen) {
                None => continue,
                b => because = b,
            }
        }
        out.push(crate::guard::consult::Overlapping {
            seal,
            history: history_of(conn, &partition)?,
            partition,
            rows,
            because,
        });
    }
    Ok(out)
}

/// `test_overlaps`, and in another file the rows found with each partition's sealed target
/// read under its own name where the run's target is another column: a run for another target
/// (or the sealed one rescaled) carries other labels, but its file may still hold the sealed
/// records (whether it then consults them is `target_seen`'s to say).
fn overlaps_under_sealed_targets(
    conn: &Connection,
    table: &crate::data::Table,
    prep: &crate::runner::Prepared,
) -> Result<Vec<(String, Vec<usize>)>> {
    let mut found = test_overlaps(conn, table, prep, |_| true)?;
    let norm = crate::data::identity::normalise;
    let mine = norm(&table.columns[prep.target_column].name);
    let others = rows::stored(conn, |p| {
        p.id != prep.partition_id && p.n_test > 0 && p.data_sha256 != table.sha256
    })?;
    // One set of identities per column read as a sealed target.
    let mut tables: Vec<(usize, rows::TableIds)> = Vec::new();
    for p in &others {
        let Some(t) = seal_of(conn, &p.id)?.target else {
            continue;
        };
        let Some(col) = crate::data::identity::find(table, &t).filter(|_| norm(&t) != mine) else {
            continue;
        };
        let at = match tables.iter().position(|(c, _)| *c == col) {
            Some(at) => at,
            None => {
                let ids = rows::TableIds::new(table, &prep.rows, prep.key, Some(col));
                tables.push((col, ids));
                tables.len() - 1
            }
        };
        for (id, rows) in rows::run_overlaps(conn, &mut tables[at].1, std::slice::from_ref(p))? {
            match found.iter_mut().find(|(f, _)| *f == id) {
                Some((_, have)) => {
                    have.extend(rows);
                    have.sort_unstable();
                    have.dedup();
                }
                None => found.push((id, rows)),
            }
        }
    }
    found.sort();
    Ok(found)
}

/// What a run's rows at `at` (positions into `prep.rows`, a partition's test rows) tell of that
/// partition's target `sealed`, for a run whose target is another column.
fn target_seen(
    conn: &Connection,
    table: &crate::data::Table,
    prep: &crate::runner::Prepared,
    partition: &str,
    sealed: &str,
    at: &[usize],
) -> Result<crate::guard::consult::TargetSeen> {
    use crate::guard::consult::TargetSeen;
    let Some(col) = crate::data::identity::find(table, sealed) else {
        return Ok(TargetSeen::Missing);
    };
    let rows: Vec<usize> = at.iter().map(|&i| prep.rows[i]).collect();
    // The partition's own data file holds its targets by construction.
    let own_file = rows::stored(conn, |p| p.id == partition)?
        .first()
        .is_some_and(|p| p.data_sha256 == table.sha256);
    if !own_file && !rows::holds_target(conn, table, &rows, partition, col)? {
        return Ok(TargetSeen::NotTheTarget);
    }
    // How closely a column of the run follows the sealed target, on the rows where both have
    // a value; as classes when either is read as classes (a classification target, text).
    // Returns the association and the rows it was judged on.
    let follows = |c: usize, classes: bool| {
        let (sealed_col, other) = (&table.columns[col], &table.columns[c]);
        let (a, b): (Vec<f64>, Vec<f64>) = rows
            .iter()
            .filter_map(|&r| Some((sealed_col.ordered(r)?, other.ordered(r)?)))
            .unzip();
        (crate::guard::stats::association(&a, &b, classes), a.len())
    };
    let text = |c: usize| matches!(table.columns[c].values, crate::data::Values::Text { .. });
    // Classes on either side: a text sealed target relabelled as numeric codes is a copy too.
    let features = prep
        .features
        .iter()
        .map(|&c| {
            // A feature with a value on too few of the rows says too little to count.
            let (a, n) = follows(c, text(c) || text(col));
            let a = if n < crate::guard::stats::FEW_ROWS {
                0.0
            } else {
                a
            };
            (table.columns[c].name.clone(), a)
        })
        .collect();
    let (target, rows) = follows(prep.target_column, !prep.classes.is_empty() || text(col));
    Ok(TargetSeen::Follows {
        target,
        features,
        rows,
    })
}

/// Earlier partitions whose development rows hold some of this run's test rows, with the runs
/// that developed on them. The same data file: by position. Another file: by the development
/// fingerprints a version-3 partition stores (an older one stores none, and is passed over),
/// all the kept rows judged together (`rows::run_developed`).
fn earlier_developments(
    conn: &Connection,
    table: &crate::data::Table,
    prep: &crate::runner::Prepared,
) -> Result<Vec<crate::guard::consult::Earlier>> {
    let err = || sql_err("find earlier development rows");
    let test = membership(prep.rows.len(), &prep.sealed.test_members());
    if !test.contains(&true) {
        return Ok(Vec::new());
    }
    let mut used = conn
        .prepare("SELECT EXISTS (SELECT 1 FROM runs WHERE partition_id = ?1)")
        .map_err(err())?;
    let mut earlier = Vec::new();
    for p in rows::stored(conn, |p| p.id != prep.partition_id)? {
        if used.query_row([&p.id], |r| r.get(0)).map_err(err())? {
            earlier.push(p);
        }
    }
    let mut found: Vec<(String, usize)> = Vec::new();
    let mut assignment_of = conn
        .prepare("SELECT assignment FROM partitions WHERE id = ?1")
        .map_err(err())?;
    let dev = [Part::Train.code(), Part::Validation.code()];
    for p in earlier.iter().filter(|p| p.data_sha256 == table.sha256) {
        let assignment: Vec<u8> = assignment_of
            .query_row([&p.id], |r| r.get(0))
            .map_err(err())?;
        let rows = (0..prep.rows.len())
            .filter(|&i| {
                test[i]
                    && assignment
                        .get(prep.rows[i])
                        .is_some_and(|c| dev.contains(c))
            })
            .count();
        found.push((p.id.clone(), rows));
    }
    let elsewhere: Vec<rows::Stored> = earlier
        .into_iter()
        .filter(|p| p.data_sha256 != table.sha256)
        .collect();
    if !elsewhere.is_empty() {
        let mut ids = rows::TableIds::new(table, &prep.rows, prep.key, Some(prep.target_column));
        for (id, at) in rows::run_developed(conn, &mut ids, &elsewhere)? {
            found.push((id, at.into_iter().filter(|&i| test[i]).count()));
        }
    }
    found.sort();
    let mut runs_of = conn
        .prepare("SELECT id FROM runs WHERE partition_id = ?1 ORDER BY id")
        .map_err(err())?;
    let mut out = Vec::new();
    for (partition, rows) in found.into_iter().filter(|(_, n)| *n > 0) {
        let runs: Vec<i64> = runs_of
            .query_map([&partition], |r| r.get(0))
            .and_then(|rows| rows.collect())
            .map_err(err())?;
        out.push(crate::guard::consult::Earlier {
            partition,
            runs,
            rows,
        });
    }
    Ok(out)
}

/// A partition's consultations so far, read over `conn` (the caller's transaction, when it
/// holds one).
fn history_of(conn: &Connection, partition: &str) -> Result<crate::guard::History> {
    let err = || sql_err("read reveals");
    let mut st = conn
        .prepare(
            "SELECT r.spec_hash, v.candidate, v.mode, v.mechanism, v.answer_kind FROM reveals v JOIN runs r ON r.id = v.run_id
             WHERE v.partition_id = ?1 ORDER BY v.id",
        )
        .map_err(err())?;
    let rows: Vec<(String, i64, String, String, String)> = st
        .query_map([partition], |r| {
            Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?))
        })
        .and_then(|rows| rows.collect())
        .map_err(err())?;
    let mut h = crate::guard::History::default();
    for (spec_hash, cand, mode, mech, kind) in rows {
        h.reveals += 1;
        h.candidates.insert((spec_hash, cand));
        match kind.as_str() {
            "test+noise" => h.over_threshold += 1,
            "refused" => h.refused += 1,
            _ => {}
        }
        let m: Value = serde_json::from_str(&mech).unwrap_or(Value::Null);
        if mode == "reusable" {
            if let Ok(state) = serde_json::from_value(m["step"]["after"].clone()) {
                h.thresholdout = Some(state);
            }
        } else if mode == "ladder" {
            h.ladder_best = m["best_units_after"].as_i64().or(h.ladder_best);
        }
    }
    let mut st = conn
        .prepare("SELECT run_id, n_rows FROM uses WHERE partition_id = ?1 ORDER BY run_id")
        .map_err(sql_err("read development uses"))?;
    h.uses = st
        .query_map([partition], |r| Ok((r.get(0)?, r.get(1)?)))
        .and_then(|rows| rows.collect())
        .map_err(sql_err("read development uses"))?;
    Ok(h)
}

/// The longest note the ledger keeps, in bytes: notes are read in listings and carried in
/// bundles, and a page of text says what a note needs to.
pub const NOTE_MAX_BYTES: usize = 16 * 1024;

/// Refuse (exit 2) a note longer than `NOTE_MAX_BYTES`.
pub fn check_note(text: &str) -> Result<()> {
    if text.len() > NOTE_MAX_BYTES {
        return Err(Error::Input(format!(
            "the note is {} bytes, more than the {NOTE_MAX_BYTES} a note may hold; shorten it, or keep the long text in a file and note where it is",
            text.len()
        )));
    }
    Ok(())
}

/// The rules a partition was sealed with, so nothing stored later (a run that started earlier
/// and finished later, a merged run) can change rules a consultation already followed:
/// - its first seal entry, if it comes before its first run in chain order (schema 11 on);
/// - else the `[guard]` of the first run stored on it in chain order (partitions stored
///   before seals were: that run sealed them, and a seal merged later changes nothing);
/// - else its pending seal (its first run's rules, from that run's start);
/// - else count mode with a budget of 1, the defaults (nothing stored yet), with `fixed`
///   false.
///
/// `by` is the run that sealed it, once stored: the first run on it with the sealing spec.
fn seal_of(conn: &Connection, partition: &str) -> Result<crate::guard::consult::Seal> {
    let first: Option<(i64, String, i64)> = conn
        .query_row(
            "SELECT r.id, r.spec_text, c.seq FROM runs r JOIN chain c ON c.kind = 'run' AND c.ref_id = r.id
             WHERE r.partition_id = ?1 ORDER BY c.seq LIMIT 1",
            [partition],
            |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)),
        )
        .optional()
        .map_err(sql_err("read seal"))?;
    type Stored = (String, Option<String>, String, i64);
    let stored = |sql: &str| -> Result<Option<Stored>> {
        conn.query_row(sql, [partition], |r| {
            Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?))
        })
        .optional()
        .map_err(sql_err("read seal"))
    };
    // Whichever is first in chain order: a seal entry that came after the partition's first
    // run (merged into a ledger from before seals, say) changes nothing.
    let sealed = match stored(
        "SELECT s.rules, s.target, s.spec_hash, c.seq FROM seals s JOIN chain c ON c.kind = 'seal' AND c.ref_id = s.id
         WHERE s.partition_id = ?1 ORDER BY c.seq LIMIT 1",
    )? {
        Some(s) if first.as_ref().is_none_or(|f| s.3 < f.2) => Some(s),
        Some(_) => None,
        None if first.is_none() => stored(
            "SELECT rules, target, spec_hash, 0 FROM pending_seals WHERE partition_id = ?1",
        )?,
        None => None,
    };
    let (rules, target, by) = match (sealed, &first) {
        (Some((rules, target, spec_hash, _)), _) => {
            let by = conn
                .query_row(
                    "SELECT r.id FROM runs r JOIN chain c ON c.kind = 'run' AND c.ref_id = r.id
                     WHERE r.partition_id = ?1 AND r.spec_hash = ?2 ORDER BY c.seq LIMIT 1",
                    [partition, &spec_hash],
                    |r| r.get(0),
                )
                .optional()
                .map_err(sql_err("read seal"))?;
            (
                serde_json::from_str(&rules)
                    .ok()
                    .and_then(|v| crate::spec::GuardSpec::from_json(&v)),
                target,
                by,
            )
        }
        (None, Some((id, text, _))) => (
            crate::spec::stored_guard(text),
            crate::spec::stored_target(text),
            Some(*id),
        ),
        (None, None) => (None, None, None),
    };
    Ok(crate::guard::consult::Seal {
        fixed: rules.is_some(),
        rules: rules.unwrap_or(crate::spec::GuardSpec::DEFAULT),
        by,
        target,
    })
}

/// Who fixed a partition's rules, and when.
pub struct SealMark<'a> {
    pub at: &'a str,
    pub user: &'a str,
    pub host: &'a str,
}

/// The seal a spec gives a new partition: (rules as JSON, target, spec hash).
fn seal_from(spec: &crate::spec::Spec) -> (String, String, String) {
    (
        spec.guard.to_json().to_string(),
        spec.data.target.name.clone(),
        spec.canonical_hash(),
    )
}

/// Chain `partition`'s seal if nothing about it is chained yet (no seal entry, no run): from
/// its pending seal; else the defaults, when it was consulted already (through another
/// partition, under them); else from `spec` (the storing run's). Called in the
/// transaction that first chains anything about the partition, before that entry, so the
/// rules it followed meanwhile are the rules the chain shows.
fn settle_seal(
    tx: &Connection,
    partition: &str,
    spec: Option<&crate::spec::Spec>,
    mark: &SealMark,
) -> Result<()> {
    let err = || sql_err("store seal");
    let chained: bool = tx
        .query_row(
            "SELECT EXISTS (SELECT 1 FROM seals s JOIN chain c ON c.kind = 'seal' AND c.ref_id = s.id WHERE s.partition_id = ?1)
                 OR EXISTS (SELECT 1 FROM runs r JOIN chain c ON c.kind = 'run' AND c.ref_id = r.id WHERE r.partition_id = ?1)",
            [partition],
            |r| r.get(0),
        )
        .map_err(err())?;
    if chained {
        return Ok(());
    }
    type Row = (String, Option<String>, String, String, String, String);
    let pending: Option<Row> = tx
        .query_row(
            "SELECT rules, target, spec_hash, sealed_at, user, host FROM pending_seals WHERE partition_id = ?1",
            [partition],
            |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?, r.get(5)?)),
        )
        .optional()
        .map_err(err())?;
    // Consulted already (through another partition) with nothing fixed: the defaults it
    // followed become its seal, so no later run or merged seal changes them.
    let consulted: bool = tx
        .query_row(
            "SELECT EXISTS (SELECT 1 FROM reveals WHERE partition_id = ?1) OR EXISTS (SELECT 1 FROM uses WHERE partition_id = ?1)",
            [partition],
            |r| r.get(0),
        )
        .map_err(err())?;
    let row = match (pending, spec) {
        (Some(p), _) => p,
        (None, _) if consulted => (
            crate::spec::GuardSpec::DEFAULT.to_json().to_string(),
            None,
            "defaults".to_string(),
            mark.at.to_string(),
            mark.user.to_string(),
            mark.host.to_string(),
        ),
        (None, Some(spec)) => {
            let (rules, target, spec_hash) = seal_from(spec);
            (
                rules,
                Some(target),
                spec_hash,
                mark.at.to_string(),
                mark.user.to_string(),
                mark.host.to_string(),
            )
        }
        // Neither consulted nor run: nothing to fix yet.
        (None, None) => return Ok(()),
    };
    tx.execute(
        "INSERT INTO seals (partition_id, rules, target, spec_hash, sealed_at, user, host) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)",
        params![partition, row.0, row.1, row.2, row.3, row.4, row.5],
    )
    .map_err(err())?;
    let id = tx.last_insert_rowid();
    tx.execute(
        "DELETE FROM pending_seals WHERE partition_id = ?1",
        [partition],
    )
    .map_err(err())?;
    chain::append(tx, "seal", id, None)?;
    Ok(())
}

/// One reveal and its scores, in the caller's transaction; returns its id.
fn insert_reveal(tx: &Connection, r: &RevealRecord) -> rusqlite::Result<i64> {
    tx.execute(
        "INSERT INTO reveals (run_id, candidate, partition_id, source, revealed_at, user, host, tool_version, mode, budget, metric,
            n_rows, seed, resamples, confidence, answer, answer_kind, mechanism, optimism)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15, ?16, ?17, ?18, ?19)",
        params![
            r.run_id, r.candidate, r.partition_id, r.source, r.revealed_at, r.user, r.host, r.tool_version, r.mode, r.budget, r.metric,
            r.n_rows, r.seed, r.resamples, r.confidence, r.answer, r.answer_kind, r.mechanism, r.optimism
        ],
    )?;
    let id = tx.last_insert_rowid();
    let mut st = tx.prepare(
        "INSERT INTO reveal_scores (reveal_id, metric, value, low, high, se) VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
    )?;
    for (m, v, lo, hi, se) in &r.scores {
        st.execute(params![id, m, v, lo, hi, se])?;
    }
    Ok(id)
}

/// Test-row identities in key order (borrowed when they already are).
fn sorted_keys(keys: &[crate::data::RowKey]) -> std::borrow::Cow<'_, [crate::data::RowKey]> {
    let mut sorted = std::borrow::Cow::Borrowed(keys);
    if !keys.is_sorted() {
        sorted.to_mut().sort_unstable();
    }
    sorted
}

/// The number of distinct identities among sorted ones.
fn distinct(sorted: &[crate::data::RowKey]) -> usize {
    sorted.chunk_by(|a, b| a == b).count()
}

/// The identity version a partition's stored settings name (1 when they name none).
pub fn settings_identity(settings: &str) -> i64 {
    serde_json::from_str::<serde_json::Value>(settings)
        .ok()
        .and_then(|v| v["identity"].as_i64())
        .unwrap_or(1)
}

/// A partition's stored settings without what is not a split setting (the identity version
/// and recipe): the split settings alone.
fn split_only(settings: &str) -> String {
    match serde_json::from_str::<serde_json::Value>(settings) {
        Ok(serde_json::Value::Object(mut m))
            if ["identity", "recipe"].iter().any(|k| m.contains_key(*k)) =>
        {
            for k in ["identity", "recipe"] {
                m.remove(k);
            }
            serde_json::Value::Object(m).to_string()
        }
        _ => settings.to_string(),
    }
}

/// A partition's stored settings: the canonical split settings; from identity version 2 on,
/// `"identity"` with the version its rows' identities were formed with, and from version 3
/// `"recipe"`, the columns they read. (The partition's id hashes the split settings alone, so
/// it depends on neither.)
pub fn partition_settings(spec: &crate::spec::Spec, prep: &crate::runner::Prepared) -> String {
    let canonical = spec.split_canonical();
    match serde_json::from_str::<serde_json::Value>(&canonical) {
        Ok(serde_json::Value::Object(mut m)) => {
            if prep.identity != crate::data::Identity::V1 {
                m.insert("identity".into(), prep.identity.number().into());
            }
            if prep.identity == crate::data::Identity::V3 {
                m.insert("recipe".into(), prep.recipe.to_json());
            }
            serde_json::Value::Object(m).to_string()
        }
        _ => canonical,
    }
}

/// Store a partition and, when it is new, its test rows' identities; true when it was new.
fn insert_partition(
    tx: &rusqlite::Transaction,
    spec: &crate::spec::Spec,
    table: &crate::data::Table,
    prep: &crate::runner::Prepared,
    ids: &crate::runner::Identities,
) -> rusqlite::Result<bool> {
    let s = &prep.sealed;
    let test_keys = &ids.test;
    tx.execute(
        "INSERT OR IGNORE INTO partitions (id, data_sha256, settings, assignment, n_train, n_validation, n_test) VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)",
        params![
            prep.partition_id,
            table.sha256,
            partition_settings(spec, prep),
            prep.assignment,
            s.count(Part::Train) as i64,
            s.count(Part::Validation) as i64,
            s.count(Part::Test) as i64
        ],
    )
    ?;
    // A new partition brings its test rows' identities (exposure follows rows).
    let fresh = tx.changes() == 1;
    if fresh {
        // In key order, so the table and its index grow at their ends, and many rows per
        // statement: a large test partition holds hundreds of thousands of rows.
        let sorted = sorted_keys(test_keys);
        let keys = &*sorted;
        let many = |n: usize| {
            let tuples: Vec<String> = (0..n).map(|i| format!("(?1, ?{})", i + 2)).collect();
            format!(
                "INSERT OR IGNORE INTO partition_rows (partition_id, row_key) VALUES {}",
                tuples.join(", ")
            )
        };
        let mut full = tx.prepare(&many(KEYS_PER_STATEMENT))?;
        for chunk in keys.chunks(KEYS_PER_STATEMENT) {
            // Borrowed values: no copy of each key.
            let mut vals: Vec<ToSqlOutput> = Vec::with_capacity(chunk.len() + 1);
            vals.push(ToSqlOutput::Borrowed(ValueRef::Text(
                prep.partition_id.as_bytes(),
            )));
            vals.extend(
                chunk
                    .iter()
                    .map(|k| ToSqlOutput::Borrowed(ValueRef::Blob(&k[..]))),
            );
            if chunk.len() == KEYS_PER_STATEMENT {
                full.execute(rusqlite::params_from_iter(vals.iter()))
            } else {
                tx.execute(&many(chunk.len()), rusqlite::params_from_iter(vals.iter()))
            }?;
        }
    }
    if fresh && prep.identity == crate::data::Identity::V3 {
        rows::insert_sets(tx, &prep.partition_id, ids, prep.key.is_some())?;
    }
    Ok(fresh)
}

/// Where a row generator puts each row (its values in table column order).
type RowOut<'a> = &'a mut dyn FnMut(&[ValueRef<'static>]);

/// Insert the rows `rows` gives into `table` (its name and column list, `width` columns),
/// `per` rows to a statement (the last statement takes what is left).
fn insert_rows(
    tx: &rusqlite::Transaction,
    table: &str,
    width: usize,
    per: usize,
    rows: &dyn Fn(RowOut),
) -> rusqlite::Result<()> {
    let sql = |n: usize| -> String {
        let tuples: Vec<String> = (0..n)
            .map(|r| {
                let cells: Vec<String> =
                    (1..=width).map(|c| format!("?{}", r * width + c)).collect();
                format!("({})", cells.join(", "))
            })
            .collect();
        format!("INSERT INTO {table} VALUES {}", tuples.join(", "))
    };
    let per = per.max(1);
    let mut full = tx.prepare(&sql(per))?;
    let mut vals: Vec<ToSqlOutput<'static>> = Vec::with_capacity(per * width);
    let mut result = Ok(());
    rows(&mut |row| {
        if result.is_err() {
            return;
        }
        vals.extend(row.iter().map(|v| ToSqlOutput::Borrowed(*v)));
        if vals.len() == per * width {
            result = full
                .execute(rusqlite::params_from_iter(vals.iter()))
                .map(drop);
            vals.clear();
        }
    });
    result?;
    if !vals.is_empty() {
        tx.execute(
            &sql(vals.len() / width),
            rusqlite::params_from_iter(vals.iter()),
        )?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn stored_run(name: &str) -> (Ledger, PathBuf) {
        stored_run_with(name, 1, false, false)
    }

    /// A run stored in a new ledger: each data line `copies` times (identical rows share an
    /// identity), its partition recorded first when `recorded`, stored a second time when
    /// `twice`.
    fn stored_run_with(
        name: &str,
        copies: usize,
        recorded: bool,
        twice: bool,
    ) -> (Ledger, PathBuf) {
        stored_edited(name, copies, recorded, twice, |_, _| {})
    }

    /// `stored_run_with`, the run's outcome changed by `edit` (given the table) before it is
    /// stored.
    fn stored_edited(
        name: &str,
        copies: usize,
        recorded: bool,
        twice: bool,
        edit: impl FnOnce(&mut RunOutcome, &crate::data::Table),
    ) -> (Ledger, PathBuf) {
        let mut csv = String::from("x1,x2,y\n");
        for i in 0..300u32 {
            let t = f64::from(i);
            let (x1, x2) = ((t * 0.731).sin(), (t * 1.37).cos());
            let line = format!("{x1},{x2},{}\n", 2.0 * x1 - x2 + (t * 2.9).sin());
            csv.push_str(&line.repeat(copies));
        }
        let table =
            crate::data::parse(csv.as_bytes(), Path::new("r.csv"), "0".into(), &[]).unwrap();
        let text = "name = \"r\"\ntask = \"regression\"\n[data]\npath = \"r.csv\"\ntarget = \"y\"\n\
            [split]\nmethod = \"random\"\nseed = 3\ntest = 0.2\nfolds = 3\n\
            [[model]]\nkind = \"ridge\"\nlambda = [0.01, 1, 100]\n";
        let spec = crate::spec::parse(text, Path::new("r.toml"), Path::new(".")).unwrap();
        let mut out = crate::runner::run(&spec, &table, 2).unwrap();
        edit(&mut out, &table);
        let dir =
            std::env::temp_dir().join(format!("probity-ledger-{name}-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).unwrap();
        let mut ledger = Ledger::open(&dir.join("l.sqlite"), true).unwrap();
        let meta = RunMeta {
            started_at: "2026-12-03T00:00:00Z".into(),
            finished_at: "2026-12-03T00:00:01Z".into(),
            tool_version: "0".into(),
            user: "u".into(),
            host: "h".into(),
            threads: 2,
            spec_path: "r.toml".into(),
            data_path: "r.csv".into(),
            note: None,
            tool_commit: "c".into(),
            target_triple: "t".into(),
            replay: None,
            start: None,
        };
        if recorded {
            let prep = &out.prepared;
            assert!(
                ledger
                    .record_partition(
                        &spec,
                        &table,
                        prep,
                        &prep.ids,
                        &SealMark {
                            at: "2026-01-01T00:00:00Z",
                            user: "u",
                            host: "h"
                        }
                    )
                    .unwrap()
            );
        }
        ledger.write_run(&spec, &table, &out, &meta).unwrap();
        if twice {
            // The same partition again: its rows are read back for the chain.
            ledger.write_run(&spec, &table, &out, &meta).unwrap();
        }
        (ledger, dir)
    }

    /// The lookups by identity, which go partition by partition over the primary key, give
    /// what one query over all rows gives (the query the dropped index served): both ways of
    /// searching a partition (key by key, and one pass), keys given twice, partitions with no
    /// shared row, and the pairs of partitions that share revealed rows.
    #[test]
    fn identity_lookups_equal_one_query_over_all_rows() {
        let dir = std::env::temp_dir().join(format!("probity-lookups-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).unwrap();
        let ledger = Ledger::open(&dir.join("l.sqlite"), true).unwrap();
        let key = |i: u32| -> crate::data::RowKey {
            let d = <sha2::Sha256 as sha2::Digest>::digest(i.to_le_bytes());
            let mut k = [0u8; 16];
            k.copy_from_slice(&d[..16]);
            k
        };
        // p1: identities 0..1000 (large: looked up key by key); p2: 250..330 (small: one pass);
        // p3: 2000..2010 (shares nothing); p4: 0..5 and 320..330 (small).
        let parts: [(&str, Vec<u32>); 4] = [
            ("p1", (0..1000).collect()),
            ("p2", (250..330).collect()),
            ("p3", (2000..2010).collect()),
            ("p4", (0..5).chain(320..330).collect()),
        ];
        ledger
            .conn
            .execute_batch("PRAGMA foreign_keys = OFF")
            .unwrap();
        for (id, rows) in &parts {
            ledger
                .conn
                .execute(
                    "INSERT INTO partitions VALUES (?1, 'd' || ?1, 's', x'00', 0, 0, ?2)",
                    params![id, rows.len() as i64],
                )
                .unwrap();
            for &i in rows {
                ledger
                    .conn
                    .execute(
                        "INSERT INTO partition_rows VALUES (?1, ?2)",
                        params![id, &key(i)[..]],
                    )
                    .unwrap();
            }
        }
        for (n, p) in ["p2", "p4", "p2"].iter().enumerate() {
            ledger
                .conn
                .execute(
                    "INSERT INTO reveals VALUES (?1, 1, 1, ?2, 'reveal', 't', 'u', 'h', '0', 'count', 1, 'rmse', 1, 's', 1, 0.9, NULL, 'test', '{}', '{}')",
                    params![n as i64 + 1, p],
                )
                .unwrap();
        }
        // Keys 0..20 twice, 240..260, and 5000 (in no partition): 41 distinct keys against p1's
        // 1000 rows are looked up one by one (41 x PROBE_COST < 1000); p2, p3 and p4 are passed
        // over.
        let mut keys: Vec<crate::data::RowKey> =
            (0..20).chain(0..20).chain(240..260).map(key).collect();
        keys.push(key(5000));
        let mut by_query: BTreeMap<String, i64> = BTreeMap::new();
        for k in &keys {
            let mut st = ledger
                .conn
                .prepare("SELECT partition_id FROM partition_rows WHERE row_key = ?1")
                .unwrap();
            let found: Vec<String> = st
                .query_map([&k[..]], |r| r.get(0))
                .unwrap()
                .map(|r| r.unwrap())
                .collect();
            for p in found {
                *by_query.entry(p).or_insert(0) += 1;
            }
        }
        // Each partition searched on its own, as `rows::sealed_rows` does.
        let given: Vec<Option<crate::data::RowKey>> = keys.iter().copied().map(Some).collect();
        let mut got = Vec::new();
        for (id, rows) in &parts {
            let m = rows::members(&ledger.conn, id, rows.len() as i64, &given).unwrap();
            let n = m.iter().filter(|m| **m).count() as i64;
            if n > 0 {
                got.push((id.to_string(), n));
            }
        }
        assert_eq!(got, by_query.into_iter().collect::<Vec<_>>());
        assert_eq!(
            got,
            vec![("p1".into(), 60), ("p2".into(), 10), ("p4".into(), 10)]
        );
        assert!(
            rows::members(&ledger.conn, "p1", 1000, &[None])
                .unwrap()
                .iter()
                .all(|m| !m)
        );
        let mut st = ledger
            .conn
            .prepare(
                "SELECT a.partition_id, b.partition_id, count(*) FROM partition_rows a
                 JOIN partition_rows b ON a.row_key = b.row_key AND a.partition_id <> b.partition_id
                 WHERE a.partition_id IN (SELECT partition_id FROM reveals)
                 GROUP BY a.partition_id, b.partition_id ORDER BY a.partition_id, b.partition_id",
            )
            .unwrap();
        let pairs: Vec<(String, String, i64)> = st
            .query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))
            .unwrap()
            .map(|r| r.unwrap())
            .collect();
        assert_eq!(
            pairs,
            [
                ("p2", "p1", 80),
                ("p2", "p4", 10),
                ("p4", "p1", 15),
                ("p4", "p2", 10)
            ]
            .map(|(a, b, n)| (a.to_string(), b.to_string(), n))
        );
        let findings = ledger.overlap_findings().unwrap();
        let expected: Vec<String> = pairs
            .iter()
            .map(|(a, b, n)| format!("{n} test rows of consulted partition {a} are also test rows of partition {b}: its test score is not fresh"))
            .collect();
        assert_eq!(findings, expected);
        let _ = std::fs::remove_dir_all(&dir);
    }

    /// The score sections hashed from memory equal the stored rows, whatever SQLite does to a
    /// value on the way in: NaN stored as NULL, -0.0 read back as 0.0, infinities and the
    /// smallest subnormal kept, absent scores NULL. `verify` rehashes the stored rows. A run
    /// whose candidates are out of order reads its rows back, and chains as well.
    #[test]
    fn score_rows_hashed_from_memory_match_the_stored_rows() {
        let odd = [
            None,
            Some(f64::NAN),
            Some(-0.0),
            Some(0.0),
            Some(f64::INFINITY),
            Some(f64::NEG_INFINITY),
            Some(5e-324),
            Some(-3.0),
            Some(1e300),
        ];
        let edit = |out: &mut RunOutcome, _: &crate::data::Table| {
            let mut at = 0;
            let mut next = || {
                at += 1;
                odd[at % odd.len()]
            };
            for c in &mut out.candidates {
                for f in &mut c.folds {
                    f.train.iter_mut().for_each(|v| *v = next());
                    f.validation.iter_mut().for_each(|v| *v = next());
                }
                for s in [
                    &mut c.train,
                    &mut c.train_se,
                    &mut c.validation,
                    &mut c.validation_se,
                ] {
                    s.iter_mut().for_each(|v| *v = next());
                }
            }
        };
        let (ledger, dir) = stored_edited("odd-scores", 1, false, false, edit);
        let (entries, breaks) = ledger.verify().unwrap();
        // The partition's seal, then the run.
        assert_eq!(entries, 2);
        assert!(breaks.is_empty(), "{breaks:?}");
        let stored: i64 = ledger
            .conn
            .query_row(
                "SELECT count(*) FROM fold_scores WHERE value IS NULL",
                [],
                |r| r.get(0),
            )
            .unwrap();
        assert!(stored > 0);
        let _ = std::fs::remove_dir_all(&dir);
        // Candidates in reverse order: the rows are read back, not taken from memory.
        let (ledger, dir) = stored_edited("reversed", 1, false, false, |out, _| {
            out.candidates.reverse();
        });
        let (_, breaks) = ledger.verify().unwrap();
        assert!(breaks.is_empty(), "{breaks:?}");
        let _ = std::fs::remove_dir_all(&dir);
    }

    /// The run's chain entry, hashed with its partition rows from memory, equals the hash of
    /// the stored rows (`verify` reads them back), repeated identities included, whether the
    /// rows went in with the run or beforehand; and a second run of the same partition, whose
    /// rows are read back, chains as well.
    #[test]
    fn partition_rows_hashed_from_memory_match_the_stored_rows() {
        for (copies, recorded) in [(1, false), (1, true), (3, false), (3, true)] {
            let (ledger, dir) = stored_run_with(
                &format!("known-{copies}-{recorded}"),
                copies,
                recorded,
                true,
            );
            let keys: i64 = ledger
                .conn
                .query_row("SELECT count(*) FROM partition_rows", [], |r| r.get(0))
                .unwrap();
            let test: i64 = ledger
                .conn
                .query_row("SELECT n_test FROM partitions", [], |r| r.get(0))
                .unwrap();
            if copies > 1 {
                assert!(keys < test, "{keys} identities of {test} test rows");
            }
            assert!(ledger.fresh.is_none());
            let (entries, breaks) = ledger.verify().unwrap();
            // The seal and both runs.
            assert_eq!((entries, breaks.len()), (3, 0), "{breaks:?}");
            // Remove one stored identity: both runs' entries no longer match.
            ledger
                .conn
                .execute_batch(
                    "DELETE FROM partition_rows WHERE row_key = (SELECT min(row_key) FROM partition_rows)",
                )
                .unwrap();
            assert_eq!(ledger.verify().unwrap().1.len(), 2);
            drop(ledger);
            let _ = std::fs::remove_dir_all(dir);
        }
    }

    /// Each partition keeps the identity version it was made with: a new one is
    /// `Identity::CURRENT` (version 3, with its recipe), named in its settings; one stored before
    /// version 2 names none and is version 1. The stored identities are those of its version,
    /// the chain holds, and a bundle whose partition is stored here in another version is
    /// refused, while one of a partition this ledger lacks merges.
    #[test]
    fn each_partition_keeps_its_identity_version() {
        use crate::data::Identity;
        let as_v1 = |out: &mut RunOutcome, table: &crate::data::Table| {
            out.prepared.identity = Identity::V1;
            out.prepared.ids = out.prepared.identities(table, 2);
        };
        let (mut old, old_dir) = stored_edited("ident-v1", 1, false, false, as_v1);
        let (mut new, new_dir) = stored_run("ident-v3");
        let stored = |l: &Ledger| -> (String, String, Vec<crate::data::RowKey>) {
            let (id, settings): (String, String) = l
                .conn
                .query_row("SELECT id, settings FROM partitions", [], |r| {
                    Ok((r.get(0)?, r.get(1)?))
                })
                .unwrap();
            let keys = l.partition_row_keys(&id).unwrap();
            (id, settings, keys)
        };
        let (old_id, old_settings, old_keys) = stored(&old);
        let (new_id, new_settings, new_keys) = stored(&new);
        assert_eq!(
            old_id, new_id,
            "the partition's id does not depend on the version"
        );
        assert_eq!(old.partition_identity(&old_id).unwrap(), Some(Identity::V1));
        assert_eq!(new.partition_identity(&new_id).unwrap(), Some(Identity::V3));
        assert!(!old_settings.contains("identity"), "{old_settings}");
        assert!(
            new_settings.contains("\"identity\":3")
                && new_settings.contains("\"recipe\":{\"columns\":[\"x1\",\"x2\"],\"key\":null}"),
            "{new_settings}"
        );
        // A run read back names its version apart from the split settings.
        for (l, v) in [(&old, 1), (&new, 3)] {
            let d = l.run(1).unwrap().unwrap();
            assert_eq!(d.identity, v);
            assert_eq!(d.split_settings, old_settings);
        }
        // The same test rows, identified each way; version 3 also keeps their labelled
        // identities and the development rows' fingerprints (60 and 240 rows, all distinct
        // here), and no key identities without a key.
        assert_eq!(old_keys.len(), new_keys.len());
        assert!(old_keys.iter().all(|k| !new_keys.contains(k)));
        let (labels, keys, dev): (Vec<u8>, Option<Vec<u8>>, Vec<u8>) = new
            .conn
            .query_row(
                "SELECT test_labels, test_keys, development FROM partition_identities",
                [],
                |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)),
            )
            .unwrap();
        assert_eq!(labels.len(), 60 * 16);
        assert_eq!(keys, None);
        assert_eq!(dev.len(), 240 * 8);
        for l in [&old, &new] {
            let (entries, breaks) = l.verify().unwrap();
            // The seal and the run.
            assert_eq!((entries, breaks.len()), (2, 0), "{breaks:?}");
        }
        // Bundles: not into a ledger that stores the partition in another version; into an
        // empty one, which keeps the bundle's version for it.
        let who = crate::guard::consult::Who {
            at: "2026-12-03T00:00:02Z".into(),
            user: "u".into(),
            host: "h".into(),
            tool_version: "t".into(),
        };
        let bundle = old.pack(&[1], "2026-12-03T00:00:02Z").unwrap().0;
        let e = new.merge(&bundle, true, &who).unwrap_err().to_string();
        assert!(e.contains("version 3 here, version 1 in the bundle"), "{e}");
        assert_eq!(new.verify().unwrap().0, 2);
        let mut empty = Ledger::open(&old_dir.join("empty.sqlite"), true).unwrap();
        let m = empty.merge(&bundle, true, &who).unwrap();
        // The partition's seal and the run.
        assert_eq!((m.merged, m.skipped), (2, 0));
        assert_eq!(
            empty.partition_identity(&old_id).unwrap(),
            Some(Identity::V1)
        );
        assert!(empty.verify().unwrap().1.is_empty());
        let back = new.pack(&[1], "2026-12-03T00:00:03Z").unwrap().0;
        assert!(old.merge(&back, true, &who).is_err());
        drop((old, new, empty));
        let _ = std::fs::remove_dir_all(old_dir);
        let _ = std::fs::remove_dir_all(new_dir);
    }

    /// The bulk write pauses SQLite's per-row checks and resumes them, leaves no row that
    /// refers to a missing one, and its own check finds a score naming a candidate the run
    /// does not have, and a missing partition.
    #[test]
    fn bulk_writes_keep_and_check_every_reference() {
        let (mut ledger, dir) = stored_run("refs");
        let on: i64 = ledger
            .conn
            .query_row("PRAGMA foreign_keys", [], |r| r.get(0))
            .unwrap();
        assert_eq!(on, 1);
        assert!(orphans(&ledger.conn).unwrap().is_empty());
        assert!(ledger.verify().unwrap().1.is_empty());
        // 1 mean baseline + 3 ridge candidates.
        let pid: String = ledger
            .conn
            .query_row("SELECT partition_id FROM runs WHERE id = 1", [], |r| {
                r.get(0)
            })
            .unwrap();
        let tx = ledger.conn.transaction().unwrap();
        check_run_references(&tx, 1, &pid, None).unwrap();
        check_run_references(&tx, 1, &pid, Some(1)).unwrap();
        let e = check_run_references(&tx, 1, &pid, Some(9))
            .unwrap_err()
            .to_string();
        assert!(e.contains("replays run 9, which is missing"), "{e}");
        tx.execute(
            "INSERT INTO fold_scores VALUES (1, 5, 0, 0, 'train', 'rmse', 1.0)",
            [],
        )
        .unwrap_err(); // per-row checks are on outside the bulk writes
        tx.execute_batch("PRAGMA defer_foreign_keys = ON").unwrap();
        tx.execute(
            "INSERT INTO fold_scores VALUES (1, 5, 0, 0, 'train', 'rmse', 1.0)",
            [],
        )
        .unwrap();
        let e = check_run_references(&tx, 1, &pid, None)
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("fold_scores name candidates 1 to 5, but it has 4"),
            "{e}"
        );
        drop(tx);
        ledger
            .conn
            .execute_batch(
                "PRAGMA foreign_keys = OFF; DELETE FROM partition_rows; DELETE FROM partition_identities; DELETE FROM partitions;",
            )
            .unwrap();
        let tx = ledger.conn.transaction().unwrap();
        let e = check_run_references(&tx, 1, &pid, None)
            .unwrap_err()
            .to_string();
        assert!(e.contains("is missing"), "{e}");
        drop(tx);
        // audit's whole-ledger check names the table that lost its parent rows.
        let o = orphans(&ledger.conn).unwrap();
        assert_eq!(o.len(), 1, "{o:?}");
        assert_eq!((o[0].kind.as_str(), o[0].id), ("runs", 1));
        assert!(o[0].what.contains("row of partitions"), "{}", o[0].what);
        drop(ledger);
        let _ = std::fs::remove_dir_all(dir);
    }
}
