//! Runs in flight: a run records its start before the grid begins (a small transaction of its
//! own) and holds a lock file beside the ledger while it lives; storing the finished run
//! deletes the start in the same transaction. A start that stays behind with its lock free is
//! a run that was killed (or whose machine stopped): `unfinished` reports it as interrupted.
//! Nothing of such a run is ever stored, so an interrupted run leaves no partial candidates.

use super::{Ledger, migrate};
use crate::error::{Error, Result};
use rusqlite::params;
use std::fs::{File, TryLockError};
use std::path::{Path, PathBuf};

/// What a start records.
#[derive(Debug, Clone)]
pub struct StartInfo {
    pub experiment: String,
    pub started_at: String,
    pub user: String,
    pub host: String,
    pub spec_path: String,
    pub spec_hash: String,
    pub data_sha256: String,
}

/// A start this process recorded, with its lock held until `release` or drop.
#[derive(Debug)]
pub struct RunStart {
    pub id: i64,
    lock_path: PathBuf,
    // Held for its lock; closing it (or the process dying) releases the lock.
    _lock: File,
}

impl RunStart {
    /// Remove the lock file once the start is gone from the ledger (after the run's commit).
    pub fn release(self) {
        // Best effort: a lock file left behind only costs a directory entry, and `unfinished`
        // reads nothing from a file whose start row is gone.
        let _ = std::fs::remove_file(&self.lock_path);
    }
}

/// Whether the process of an unfinished run still lives.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum StartState {
    /// Its lock is held: the run is still going.
    Running,
    /// Its lock is free or its lock file is gone: the process ended without storing the run.
    Interrupted,
}

impl StartState {
    pub fn name(self) -> &'static str {
        match self {
            StartState::Running => "running",
            StartState::Interrupted => "interrupted",
        }
    }
}

/// A recorded start without a stored run.
#[derive(Debug, Clone)]
pub struct Unfinished {
    pub id: i64,
    pub experiment: String,
    pub started_at: String,
    pub user: String,
    pub host: String,
    pub pid: i64,
    pub spec_path: String,
    pub data_sha256: String,
    pub state: StartState,
}

fn lock_path(ledger: &Path, name: &str) -> PathBuf {
    ledger.with_file_name(name)
}

impl Ledger {
    /// Record a run's start and take its lock, before any long work.
    pub fn begin_run(&mut self, info: &StartInfo) -> Result<RunStart> {
        let path = self.path.clone();
        let fail = |e: rusqlite::Error| migrate::refuse_or_fail(&path, e, "record run start");
        let tx = self
            .conn
            .transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)
            .map_err(fail)?;
        let id: i64 = tx
            .query_row("SELECT coalesce(max(id), 0) + 1 FROM run_starts", [], |r| {
                r.get(0)
            })
            .map_err(fail)?;
        let file_name = format!(
            "{}.start{id}.lock",
            path.file_name()
                .map_or_else(|| "ledger".into(), |n| n.to_string_lossy())
        );
        let lock_path = lock_path(&path, &file_name);
        let io = |e: std::io::Error| Error::LedgerRefused {
            path: lock_path.clone(),
            msg: format!("cannot create the run's lock file: {e}"),
        };
        // Locked before the start commits: a reader never sees a live start without its lock.
        let lock = File::create(&lock_path).map_err(io)?;
        lock.try_lock().map_err(|e| Error::LedgerRefused {
            path: lock_path.clone(),
            msg: format!("another process holds this run's lock file: {e}"),
        })?;
        let inserted = tx
            .execute(
                "INSERT INTO run_starts (id, experiment, started_at, user, host, pid, spec_path, spec_hash, data_sha256, lock_file)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10)",
                params![
                    id,
                    info.experiment,
                    info.started_at,
                    info.user,
                    info.host,
                    i64::from(std::process::id()),
                    info.spec_path,
                    info.spec_hash,
                    info.data_sha256,
                    file_name
                ],
            )
            .and_then(|_| tx.commit());
        if let Err(e) = inserted {
            let _ = std::fs::remove_file(&lock_path);
            return Err(fail(e));
        }
        Ok(RunStart {
            id,
            lock_path,
            _lock: lock,
        })
    }

    /// Delete the start of a run that failed cleanly (its error is reported; nothing of it is
    /// stored), and remove its lock file.
    pub fn abandon_run(&mut self, start: RunStart) -> Result<()> {
        let path = self.path.clone();
        let fail = |e: rusqlite::Error| migrate::refuse_or_fail(&path, e, "forget run start");
        self.conn
            .execute("DELETE FROM run_starts WHERE id = ?1", [start.id])
            .map_err(fail)?;
        start.release();
        Ok(())
    }

    /// Starts without a stored run, oldest first, each with whether its process still lives.
    pub fn unfinished(&self) -> Result<Vec<Unfinished>> {
        let fail = |e: rusqlite::Error| Error::Ledger {
            context: "list unfinished runs".into(),
            source: e,
        };
        let mut stmt = self
            .conn
            .prepare(
                "SELECT id, experiment, started_at, user, host, pid, spec_path, data_sha256, lock_file
                 FROM run_starts ORDER BY id",
            )
            .map_err(fail)?;
        let rows = stmt
            .query_map([], |r| {
                Ok((
                    Unfinished {
                        id: r.get(0)?,
                        experiment: r.get(1)?,
                        started_at: r.get(2)?,
                        user: r.get(3)?,
                        host: r.get(4)?,
                        pid: r.get(5)?,
                        spec_path: r.get(6)?,
                        data_sha256: r.get(7)?,
                        state: StartState::Interrupted,
                    },
                    r.get::<_, String>(8)?,
                ))
            })
            .map_err(fail)?
            .collect::<rusqlite::Result<Vec<_>>>()
            .map_err(fail)?;
        Ok(rows
            .into_iter()
            .map(|(mut u, file)| {
                u.state = probe(&lock_path(&self.path, &file));
                u
            })
            .collect())
    }
}

/// Running while some process holds the lock; interrupted when the lock is free or the file is
/// gone (the lock dies with its process, whatever killed it).
fn probe(lock: &Path) -> StartState {
    let Ok(f) = File::open(lock) else {
        return StartState::Interrupted;
    };
    match f.try_lock_shared() {
        Err(TryLockError::WouldBlock) => StartState::Running,
        // Free (the shared lock is dropped with `f`), or the file system has no locks: nothing
        // shows the run alive.
        _ => StartState::Interrupted,
    }
}
