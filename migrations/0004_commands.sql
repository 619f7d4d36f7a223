-- Schema version 4: external command families.
-- A candidate whose command failed on some fold carries the reason and has no scores.
ALTER TABLE candidates ADD COLUMN failure TEXT;

-- Files an external command family depends on, fingerprinted with every run.
CREATE TABLE run_inputs (
    run_id  INTEGER NOT NULL REFERENCES runs(id),
    path    TEXT NOT NULL,                   -- as written in the spec, relative to its folder
    sha256  TEXT NOT NULL,
    PRIMARY KEY (run_id, path)
) STRICT;
