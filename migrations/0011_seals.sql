-- Schema version 11: a partition's seal is fixed when the partition is first stored.
-- `pending_seals`: the rules of the run that first stored a partition, from that moment (the
-- run's start, before its grid) until anything about the partition is chained. It is this
-- ledger's own record, like `run_starts`, and goes when a run that failed cleanly takes its
-- partition with it.
-- `seals`: a chained entry of its own ("seal"), written from the pending seal (or from the
-- storing run's spec) in the transaction that first chains anything about the partition: its
-- first run, a consultation of its rows through another partition, or a merge. The first
-- seal in chain order governs the partition; a merged partition brings its sender's seal,
-- which governs only where this ledger had none. No foreign key: a bundle's seal entry comes
-- before the run that brings its partition.
CREATE TABLE pending_seals (
    partition_id  TEXT PRIMARY KEY REFERENCES partitions(id),
    rules         TEXT NOT NULL,             -- the [guard] as canonical JSON
    target        TEXT,                      -- the sealing spec's [data] target
    spec_hash     TEXT NOT NULL,             -- the sealing spec's canonical hash
    sealed_at     TEXT NOT NULL,             -- UTC, RFC 3339
    user          TEXT NOT NULL,
    host          TEXT NOT NULL
) STRICT;

CREATE TABLE seals (
    id            INTEGER PRIMARY KEY,
    partition_id  TEXT NOT NULL,
    rules         TEXT NOT NULL,
    target        TEXT,
    spec_hash     TEXT NOT NULL,
    sealed_at     TEXT NOT NULL,
    user          TEXT NOT NULL,
    host          TEXT NOT NULL
) STRICT;
CREATE INDEX seals_by_partition ON seals (partition_id);

-- The chain takes the new kind: SQLite cannot change a CHECK in place, so the table is
-- rebuilt with the same columns and rows (its hashes are untouched).
CREATE TABLE chain_11 (
    seq         INTEGER PRIMARY KEY,
    kind        TEXT NOT NULL CHECK (kind IN ('run', 'reveal', 'note', 'seal')),
    ref_id      INTEGER NOT NULL,             -- runs.id, reveals.id, notes.id or seals.id
    prev_hash   TEXT NOT NULL,
    entry_hash  TEXT NOT NULL UNIQUE,
    origin      TEXT,
    origin_prev TEXT,
    merge_id    INTEGER,
    UNIQUE (kind, ref_id)
) STRICT;
INSERT INTO chain_11 (seq, kind, ref_id, prev_hash, entry_hash, origin, origin_prev, merge_id)
    SELECT seq, kind, ref_id, prev_hash, entry_hash, origin, origin_prev, merge_id FROM chain;
DROP TABLE chain;
ALTER TABLE chain_11 RENAME TO chain;
