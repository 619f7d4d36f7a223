-- Schema version 3: exact replay and the tamper-evident chain.
-- Every entry (a run with everything stored under it, a reveal with its scores, a note) is
-- linked into `chain`: entry_hash = SHA-256(prev_hash || canonical bytes of the entry), with
-- prev_hash as 64 hex characters (64 zeros before the first entry). Nothing is ever updated
-- or deleted; corrections are new entries.

ALTER TABLE runs ADD COLUMN tool_commit TEXT NOT NULL DEFAULT 'unknown';
ALTER TABLE runs ADD COLUMN target_triple TEXT NOT NULL DEFAULT 'unknown';
-- SHA-256 of the refitted model's predictions on the development rows, as little-endian f64 bytes.
ALTER TABLE runs ADD COLUMN predictions_digest TEXT;
-- Set on a run that is the replay of another.
ALTER TABLE runs ADD COLUMN replay_of INTEGER REFERENCES runs(id);

CREATE TABLE replays (
    run_id       INTEGER PRIMARY KEY REFERENCES runs(id),
    replay_of    INTEGER NOT NULL REFERENCES runs(id),
    identical    INTEGER NOT NULL,
    compared     INTEGER NOT NULL,
    differing    INTEGER NOT NULL,
    differences  TEXT NOT NULL               -- JSON: the first differences with both values
) STRICT;

CREATE TABLE notes (
    id          INTEGER PRIMARY KEY,
    run_id      INTEGER NOT NULL REFERENCES runs(id),
    written_at  TEXT NOT NULL,
    user        TEXT NOT NULL,
    text        TEXT NOT NULL
) STRICT;

CREATE TABLE chain (
    seq         INTEGER PRIMARY KEY,
    kind        TEXT NOT NULL CHECK (kind IN ('run', 'reveal', 'note')),
    ref_id      INTEGER NOT NULL,             -- runs.id, reveals.id or notes.id
    prev_hash   TEXT NOT NULL,
    entry_hash  TEXT NOT NULL UNIQUE,
    origin      TEXT,                         -- entry_hash in the ledger it was merged from, if merged
    origin_prev TEXT,                         -- that entry's prev_hash there (a fork shows as two origins with one origin_prev)
    UNIQUE (kind, ref_id)
) STRICT;

CREATE TABLE meta (
    key    TEXT PRIMARY KEY,
    value  TEXT NOT NULL
) STRICT;
