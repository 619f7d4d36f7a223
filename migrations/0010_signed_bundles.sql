-- Schema version 10: signed bundles.
-- The public keys this ledger trusts to sign bundles, each under a name; and one record per
-- merge, saying who signed the bundle and whether the key was trusted here (or whether the
-- user merged an unverified bundle with `--allow-unverified`). Each merged chain entry names
-- its merge. Both are this ledger's own records: they are not chained, and never travel in a
-- bundle.
CREATE TABLE trusted_keys (
    public_key  TEXT PRIMARY KEY,            -- Ed25519, 64 lowercase hex digits
    name        TEXT NOT NULL,
    added_at    TEXT NOT NULL,               -- UTC, RFC 3339
    added_by    TEXT NOT NULL                -- user@host
) STRICT;

CREATE TABLE merges (
    id                 INTEGER PRIMARY KEY,
    merged_at          TEXT NOT NULL,        -- UTC, RFC 3339
    user               TEXT NOT NULL,
    host               TEXT NOT NULL,
    tool_version       TEXT NOT NULL,
    bundle_created_at  TEXT NOT NULL,
    signer             TEXT,                 -- the name in the bundle; NULL when unsigned
    public_key         TEXT,
    verdict            TEXT NOT NULL CHECK (verdict IN ('trusted', 'untrusted', 'unsigned')),
    trusted_as         TEXT,                 -- the name this ledger trusts the key under
    merged             INTEGER NOT NULL,
    skipped            INTEGER NOT NULL
) STRICT;

-- No foreign key: a column with one could not be dropped again, and merges are local records.
ALTER TABLE chain ADD COLUMN merge_id INTEGER;             -- merges.id, for a merged entry
