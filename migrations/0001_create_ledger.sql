-- probity ledger, schema version 1.
-- Scores are IEEE-754 doubles stored as REAL (exact); NULL marks an undefined score.
-- Seeds are decimal TEXT because derived seeds use all 64 unsigned bits.

CREATE TABLE partitions (
    id            TEXT PRIMARY KEY,          -- SHA-256 prefix of data hash + split settings + assignment
    data_sha256   TEXT NOT NULL,
    settings      TEXT NOT NULL,             -- canonical JSON of the split settings
    assignment    BLOB NOT NULL,             -- one byte per data row: r train, v validation, t test, - dropped
    n_train       INTEGER NOT NULL,
    n_validation  INTEGER NOT NULL,
    n_test        INTEGER NOT NULL
) STRICT;

CREATE TABLE runs (
    id            INTEGER PRIMARY KEY,
    experiment    TEXT NOT NULL,
    status        TEXT NOT NULL CHECK (status IN ('complete')),
    started_at    TEXT NOT NULL,             -- UTC, RFC 3339
    finished_at   TEXT NOT NULL,
    tool_version  TEXT NOT NULL,
    user          TEXT NOT NULL,
    host          TEXT NOT NULL,
    threads       INTEGER NOT NULL,
    seed          TEXT NOT NULL,
    spec_path     TEXT NOT NULL,
    spec_text     TEXT NOT NULL,             -- verbatim
    spec_hash     TEXT NOT NULL,             -- SHA-256 of the canonical spec JSON
    data_path     TEXT NOT NULL,
    data_sha256   TEXT NOT NULL,
    data_rows     INTEGER NOT NULL,
    data_columns  INTEGER NOT NULL,
    rows_used     INTEGER NOT NULL,
    partition_id  TEXT NOT NULL REFERENCES partitions(id),
    holdout       INTEGER NOT NULL,          -- 1 when a fixed validation partition was scored
    metric        TEXT NOT NULL,
    rule          TEXT NOT NULL,
    best          INTEGER NOT NULL,
    selected      INTEGER NOT NULL,
    model_json    TEXT NOT NULL,             -- the selected candidate refitted on all development rows
    note          TEXT
) STRICT;

CREATE TABLE folds (
    run_id   INTEGER NOT NULL REFERENCES runs(id),
    repeat   INTEGER NOT NULL,
    fold     INTEGER NOT NULL,
    n_fit    INTEGER NOT NULL,
    n_score  INTEGER NOT NULL,
    PRIMARY KEY (run_id, repeat, fold)
) STRICT;

CREATE TABLE candidates (
    run_id       INTEGER NOT NULL REFERENCES runs(id),
    id           INTEGER NOT NULL,
    family       TEXT NOT NULL,
    params       TEXT NOT NULL,              -- JSON object, parameter name -> value
    standardize  INTEGER NOT NULL,
    seed         TEXT NOT NULL,
    PRIMARY KEY (run_id, id)
) STRICT;

CREATE TABLE fold_scores (
    run_id     INTEGER NOT NULL,
    candidate  INTEGER NOT NULL,
    repeat     INTEGER NOT NULL,
    fold       INTEGER NOT NULL,
    part       TEXT NOT NULL CHECK (part IN ('train', 'validation')),
    metric     TEXT NOT NULL,
    value      REAL,
    PRIMARY KEY (run_id, candidate, repeat, fold, part, metric),
    FOREIGN KEY (run_id, candidate) REFERENCES candidates(run_id, id)
) STRICT;

CREATE TABLE scores (
    run_id     INTEGER NOT NULL,
    candidate  INTEGER NOT NULL,
    part       TEXT NOT NULL CHECK (part IN ('train', 'validation')),
    metric     TEXT NOT NULL,
    mean       REAL,                         -- mean over folds (the score itself for a fixed validation partition)
    se         REAL,                         -- standard error over folds; NULL with one fold
    PRIMARY KEY (run_id, candidate, part, metric),
    FOREIGN KEY (run_id, candidate) REFERENCES candidates(run_id, id)
) STRICT;

CREATE TABLE warnings (
    run_id   INTEGER NOT NULL REFERENCES runs(id),
    seq      INTEGER NOT NULL,
    message  TEXT NOT NULL,
    PRIMARY KEY (run_id, seq)
) STRICT;
