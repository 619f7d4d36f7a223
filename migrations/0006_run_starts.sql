-- Schema version 6: runs in flight.
-- A run records its start here, in a small transaction of its own, before the grid begins; the
-- transaction that stores the finished run deletes the row again. A row that stays belongs to
-- a run still going or to one that was killed: the process holds `lock_file` (beside the
-- ledger) locked while it lives, and the operating system releases that lock when it dies.
-- These rows are not chain entries: nothing of an unfinished run is ever part of the record.
CREATE TABLE run_starts (
    id           INTEGER PRIMARY KEY,
    experiment   TEXT NOT NULL,
    started_at   TEXT NOT NULL,              -- UTC, RFC 3339
    user         TEXT NOT NULL,
    host         TEXT NOT NULL,
    pid          INTEGER NOT NULL,
    spec_path    TEXT NOT NULL,
    spec_hash    TEXT NOT NULL,
    data_sha256  TEXT NOT NULL,
    lock_file    TEXT NOT NULL               -- a file name in the ledger's folder
) STRICT;
