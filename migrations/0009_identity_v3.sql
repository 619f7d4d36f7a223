-- Schema version 9: row identity version 3 (src/data/identity.rs).
-- A version-3 partition keeps, beside its test rows' feature identities in `partition_rows`
-- (what a prediction's rows are compared by: they may come without targets):
-- - its test rows' labelled identities (features and target together: what another run's
--   rows are compared by, since a run's rows carry their targets and a record that only looks
--   alike to a model is not the sealed record) and, with a key, their key identities;
-- - its development rows' labelled and key fingerprints (64-bit, fast: there may be millions),
--   so a later test partition on another file can tell whether its rows were developed on.
-- Each is one sorted blob of distinct identities (16 bytes each; fingerprints 8 bytes each,
-- little-endian). A run whose features differ from its partition's recipe keeps the test
-- rows' feature identities under its own recipe, so its model's predictions are checked on
-- the features it reads. Both tables are chained with their runs (sections hashed only when
-- they hold rows).
CREATE TABLE partition_identities (
    partition_id      TEXT PRIMARY KEY REFERENCES partitions(id),
    test_labels       BLOB NOT NULL,
    test_keys         BLOB,                  -- NULL without a key
    development       BLOB NOT NULL,
    development_keys  BLOB                   -- NULL without a key
) STRICT;

CREATE TABLE run_identities (
    run_id     INTEGER PRIMARY KEY REFERENCES runs(id),
    recipe     TEXT NOT NULL,                -- the run's recipe (JSON: feature columns, key)
    test_rows  BLOB NOT NULL                 -- the partition's test rows' feature identities under it
) STRICT;
