-- Schema version 5: the two score tables keep their rows in primary-key order (WITHOUT ROWID).
-- A run writes one row per candidate, fold, part and metric; with a separate rowid table each
-- row was stored twice (table and key index). Same columns in the same order, same rows, so
-- every stored entry hashes to the same chain value as before.

CREATE TABLE fold_scores_v5 (
    run_id     INTEGER NOT NULL,
    candidate  INTEGER NOT NULL,
    repeat     INTEGER NOT NULL,
    fold       INTEGER NOT NULL,
    part       TEXT NOT NULL CHECK (part IN ('train', 'validation')),
    metric     TEXT NOT NULL,
    value      REAL,
    PRIMARY KEY (run_id, candidate, repeat, fold, part, metric),
    FOREIGN KEY (run_id, candidate) REFERENCES candidates(run_id, id)
) STRICT, WITHOUT ROWID;

INSERT INTO fold_scores_v5 SELECT * FROM fold_scores;
DROP TABLE fold_scores;
ALTER TABLE fold_scores_v5 RENAME TO fold_scores;

CREATE TABLE scores_v5 (
    run_id     INTEGER NOT NULL,
    candidate  INTEGER NOT NULL,
    part       TEXT NOT NULL CHECK (part IN ('train', 'validation')),
    metric     TEXT NOT NULL,
    mean       REAL,                         -- mean over folds (the score itself for a fixed validation partition)
    se         REAL,                         -- standard error over folds; NULL with one fold
    PRIMARY KEY (run_id, candidate, part, metric),
    FOREIGN KEY (run_id, candidate) REFERENCES candidates(run_id, id)
) STRICT, WITHOUT ROWID;

INSERT INTO scores_v5 SELECT * FROM scores;
DROP TABLE scores;
ALTER TABLE scores_v5 RENAME TO scores;
