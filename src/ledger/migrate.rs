//! Numbered schema migrations, compiled in, applied in order in one transaction; the schema
//! version lives in `PRAGMA user_version`.

use crate::error::{Error, Result};
use rusqlite::Connection;
use std::path::Path;

/// Every migration in order: (file name, SQL). Append only; never edit a merged file.
pub const MIGRATIONS: &[(&str, &str)] = &[
    (
        "0001_create_ledger.sql",
        include_str!("../../migrations/0001_create_ledger.sql"),
    ),
    (
        "0002_reveals.sql",
        include_str!("../../migrations/0002_reveals.sql"),
    ),
    (
        "0003_chain.sql",
        include_str!("../../migrations/0003_chain.sql"),
    ),
    (
        "0004_commands.sql",
        include_str!("../../migrations/0004_commands.sql"),
    ),
    (
        "0005_scores_without_rowid.sql",
        include_str!("../../migrations/0005_scores_without_rowid.sql"),
    ),
    (
        "0006_run_starts.sql",
        include_str!("../../migrations/0006_run_starts.sql"),
    ),
    (
        "0007_partition_rows_without_key_index.sql",
        include_str!("../../migrations/0007_partition_rows_without_key_index.sql"),
    ),
    (
        "0008_development_uses.sql",
        include_str!("../../migrations/0008_development_uses.sql"),
    ),
    (
        "0009_identity_v3.sql",
        include_str!("../../migrations/0009_identity_v3.sql"),
    ),
    (
        "0010_signed_bundles.sql",
        include_str!("../../migrations/0010_signed_bundles.sql"),
    ),
    (
        "0011_seals.sql",
        include_str!("../../migrations/0011_seals.sql"),
    ),
];

/// The schema version this binary writes.
pub fn latest() -> i64 {
    MIGRATIONS.len() as i64
}

/// Bring the ledger up to `latest()`; refuse a ledger from a newer probity.
pub fn migrate(conn: &mut Connection, path: &Path) -> Result<()> {
    let version: i64 = conn
        .query_row("PRAGMA user_version", [], |r| r.get(0))
        .map_err(|e| refuse_or_fail(path, e, "read schema version"))?;
    if version > latest() {
        return Err(Error::LedgerRefused {
            path: path.to_path_buf(),
            msg: format!(
                "schema version {version} is newer than this probity understands ({}); upgrade probity to use it",
                latest()
            ),
        });
    }
    if version == latest() {
        return Ok(());
    }
    // IMMEDIATE takes the write lock first (waiting on the busy timeout), and the version is read
    // again under it: two processes opening a new ledger at once migrate it once, not twice.
    let tx = conn
        .transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)
        .map_err(|e| refuse_or_fail(path, e, "begin migration"))?;
    let version: i64 = tx
        .query_row("PRAGMA user_version", [], |r| r.get(0))
        .map_err(|e| refuse_or_fail(path, e, "read schema version"))?;
    if version >= latest() {
        return Ok(());
    }
    for (name, sql) in &MIGRATIONS[version as usize..] {
        tx.execute_batch(sql).map_err(|e| Error::Ledger {
            context: format!("apply migration {name}"),
            source: e,
        })?;
    }
    // Entries written before the chain existed are linked in, in id order, as the chain's
    // start: this happens once, inside the migration, never on an ordinary open.
    if version < 3 {
        super::chain::adopt(&tx)?;
    }
    tx.pragma_update(None, "user_version", latest())
        .map_err(|e| Error::Ledger {
            context: "set schema version".into(),
            source: e,
        })?;
    tx.commit()
        .map_err(|e| refuse_or_fail(path, e, "commit migration"))?;
    Ok(())
}

/// A file that is not SQLite, or a read-only or full disk, is the user's to fix (exit 2).
pub(super) fn refuse_or_fail(path: &Path, e: rusqlite::Error, context: &str) -> Error {
    use rusqlite::ErrorCode as C;
    let user = match e.sqlite_error_code() {
        Some(C::NotADatabase) => {
            Some("is not a probity ledger (not an SQLite database); pass another --ledger path")
        }
        Some(C::ReadOnly) => Some(super::READ_ONLY),
        Some(C::DiskFull) => Some(
            "cannot be written: the disk is full; nothing was recorded (free some space and run the command again)",
        ),
        Some(C::CannotOpen) => Some(
            "cannot be opened for writing; its folder must exist and be writable (SQLite keeps its log files beside the ledger); history, show, audit, export, compare, plot, report and predict can still read a read-only ledger",
        ),
        Some(C::PermissionDenied) => Some("permission denied"),
        Some(C::DatabaseBusy | C::DatabaseLocked) => Some(
            "is busy: another probity process held its write lock for longer than the 10 s wait; nothing was recorded, run the command again",
        ),
        _ => None,
    };
    match user {
        Some(msg) => Error::LedgerRefused {
            path: path.to_path_buf(),
            msg: msg.into(),
        },
        None => Error::Ledger {
            context: context.into(),
            source: e,
        },
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn migration_list_matches_the_folder() {
        let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("migrations");
        let mut files: Vec<String> = std::fs::read_dir(dir)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .filter(|n| n.ends_with(".sql"))
            .collect();
        files.sort();
        let listed: Vec<String> = MIGRATIONS.iter().map(|m| m.0.to_string()).collect();
        assert_eq!(
            files, listed,
            "every file in migrations/ must be listed in MIGRATIONS, in order"
        );
        for (i, name) in listed.iter().enumerate() {
            assert!(
                name.starts_with(&format!("{:04}_", i + 1)),
                "{name} breaks the contiguous numbering"
            );
        }
    }

    #[test]
    fn applies_to_memory_and_is_idempotent() {
        let mut c = Connection::open_in_memory().unwrap();
        migrate(&mut c, Path::new(":memory:")).unwrap();
        let v: i64 = c
            .query_row("PRAGMA user_version", [], |r| r.get(0))
            .unwrap();
        assert_eq!(v, latest());
        migrate(&mut c, Path::new(":memory:")).unwrap();
        let v2: i64 = c
            .query_row("PRAGMA user_version", [], |r| r.get(0))
            .unwrap();
        assert_eq!(v2, latest());
    }

    #[test]
    fn refuses_a_newer_schema() {
        let mut c = Connection::open_in_memory().unwrap();
        c.pragma_update(None, "user_version", latest() + 1).unwrap();
        let e = migrate(&mut c, Path::new("x.sqlite")).unwrap_err();
        assert_eq!(e.exit_code(), 2);
        assert!(e.to_string().contains("newer"), "{e}");
    }

    /// 0007 drops partition_rows' index by identity alone from a version 6 ledger; the rows stay.
    #[test]
    fn the_identity_index_goes_and_the_rows_stay() {
        let mut c = Connection::open_in_memory().unwrap();
        c.pragma_update(None, "foreign_keys", "OFF").unwrap();
        for (_, sql) in &MIGRATIONS[..6] {
            c.execute_batch(sql).unwrap();
        }
        c.pragma_update(None, "user_version", 6).unwrap();
        c.execute_batch("INSERT INTO partition_rows VALUES ('p', x'01'), ('p', x'02');")
            .unwrap();
        let index = |c: &Connection| -> i64 {
            c.query_row(
                "SELECT count(*) FROM sqlite_schema WHERE name = 'partition_rows_by_key'",
                [],
                |r| r.get(0),
            )
            .unwrap()
        };
        assert_eq!(index(&c), 1);
        migrate(&mut c, Path::new(":memory:")).unwrap();
        assert_eq!(index(&c), 0);
        let n: i64 = c
            .query_row("SELECT count(*) FROM partition_rows", [], |r| r.get(0))
            .unwrap();
        assert_eq!(n, 2);
    }

    /// 0005 rebuilds the score tables: every row survives, in the same columns and order, so
    /// the canonical bytes the chain hashes do not change.
    #[test]
    fn scores_survive_the_rebuild_unchanged() {
        let c = Connection::open_in_memory().unwrap();
        // Score rows without their runs and candidates: the rebuild is what is under test.
        c.pragma_update(None, "foreign_keys", "OFF").unwrap();
        for (_, sql) in &MIGRATIONS[..4] {
            c.execute_batch(sql).unwrap();
        }
        c.execute_batch(
            "INSERT INTO fold_scores VALUES (1, 2, 0, 1, 'train', 'rmse', 0.5), (1, 2, 0, 0, 'validation', 'mae', NULL), (1, 1, 0, 0, 'train', 'r2', -3.25);
             INSERT INTO scores VALUES (1, 2, 'train', 'rmse', 0.5, 0.125), (1, 1, 'validation', 'r2', NULL, NULL);",
        )
        .unwrap();
        let dump = |c: &Connection| -> Vec<Vec<rusqlite::types::Value>> {
            let mut out = Vec::new();
            for sql in [
                "SELECT * FROM fold_scores ORDER BY run_id, candidate, repeat, fold, part, metric",
                "SELECT * FROM scores ORDER BY run_id, candidate, part, metric",
            ] {
                let mut st = c.prepare(sql).unwrap();
                let n = st.column_count();
                let rows = st
                    .query_map([], |r| (0..n).map(|k| r.get(k)).collect())
                    .unwrap();
                out.extend(rows.map(|r| r.unwrap()));
            }
            out
        };
        let before = dump(&c);
        c.execute_batch(MIGRATIONS[4].1).unwrap();
        assert_eq!(dump(&c), before);
        assert_eq!(before.len(), 5);
    }
}
