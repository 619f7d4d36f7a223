-- Schema version 8: development uses of sealed partitions.
-- A run whose development rows (fitted or scored) include test rows of another stored partition
-- consults that partition's test set: its validation scores are scores on those sealed targets.
-- Each such run counts once toward the partition's budget, beside its reveals. Written in the
-- run's own transaction and chained with the run (a section hashed only when it holds rows, so
-- entries written before this version keep their hashes).
CREATE TABLE uses (
    run_id        INTEGER NOT NULL REFERENCES runs(id),
    -- No reference: a run merged from a bundle may name a partition this ledger has not
    -- received (yet); the use counts as soon as the partition arrives.
    partition_id  TEXT NOT NULL,
    n_rows        INTEGER NOT NULL,           -- the run's development rows that are its test rows
    PRIMARY KEY (run_id, partition_id)
) STRICT, WITHOUT ROWID;

CREATE INDEX uses_by_partition ON uses (partition_id, run_id);
