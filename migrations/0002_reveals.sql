-- Schema version 2: the sealed test partition's accounting.
-- A reveal scores one candidate once on a partition's test rows. Rows are the unit of exposure:
-- partition_rows holds the identity of every test row of every partition (the key column's
-- value, or the row's content, hashed), so exposure follows rows across seeds and split methods.

CREATE TABLE partition_rows (
    partition_id  TEXT NOT NULL REFERENCES partitions(id),
    row_key       BLOB NOT NULL,             -- 16 bytes of SHA-256 of the row identity
    PRIMARY KEY (partition_id, row_key)
) STRICT, WITHOUT ROWID;

CREATE INDEX partition_rows_by_key ON partition_rows (row_key);

CREATE TABLE reveals (
    id            INTEGER PRIMARY KEY,
    run_id        INTEGER NOT NULL REFERENCES runs(id),
    candidate     INTEGER NOT NULL,
    partition_id  TEXT NOT NULL REFERENCES partitions(id),
    source        TEXT NOT NULL CHECK (source IN ('reveal', 'predict')),
    revealed_at   TEXT NOT NULL,             -- UTC, RFC 3339
    user          TEXT NOT NULL,
    host          TEXT NOT NULL,
    tool_version  TEXT NOT NULL,
    mode          TEXT NOT NULL,             -- count | reusable | ladder
    budget        INTEGER NOT NULL,
    metric        TEXT NOT NULL,             -- the selection metric the mode answers for
    n_rows        INTEGER NOT NULL,          -- test rows scored
    seed          TEXT NOT NULL,             -- seed of the bootstrap and noise streams
    resamples     INTEGER NOT NULL,
    confidence    REAL NOT NULL,
    answer        REAL,                      -- the value shown for `metric` under `mode`; NULL when refused
    answer_kind   TEXT NOT NULL,             -- test | development | test+noise | refused | ladder-new | ladder-previous
    mechanism     TEXT NOT NULL,             -- JSON: the mechanism's state and noise draws
    optimism      TEXT NOT NULL,             -- JSON: the optimism estimate shown
    FOREIGN KEY (run_id, candidate) REFERENCES candidates(run_id, id)
) STRICT;

CREATE INDEX reveals_by_partition ON reveals (partition_id, id);

CREATE TABLE reveal_scores (
    reveal_id  INTEGER NOT NULL REFERENCES reveals(id),
    metric     TEXT NOT NULL,
    value      REAL,                         -- the exact test score (stored even when the mode shows another answer)
    low        REAL,                         -- percentile bootstrap interval
    high       REAL,
    se         REAL,                         -- bootstrap standard error
    PRIMARY KEY (reveal_id, metric)
) STRICT;

CREATE TABLE nested (
    run_id       INTEGER PRIMARY KEY REFERENCES runs(id),
    metric       TEXT NOT NULL,
    estimate     REAL,                       -- mean over outer folds of the selected procedure's score
    se           REAL,
    outer_folds  INTEGER NOT NULL,
    selections   TEXT NOT NULL               -- JSON: the candidate the inner selection chose in each outer fold
) STRICT;
