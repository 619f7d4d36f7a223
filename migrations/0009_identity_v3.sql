-- Schema version 9: row identity version 3.
-- A version-3 partition identifies its rows in three ways (src/data/identity.rs):
-- - by feature cells (by column name, numbers to ten significant digits): `partition_rows`
--   holds its test rows' feature identities, which predictions are compared by (their rows
--   may come without targets);
-- - by feature cells and target together: `partition_labels` holds its test rows' labelled
--   identities, which other runs' rows are compared by (a run's rows always carry targets, and
--   a record that only looks alike to a model is not the sealed record);
-- - when the spec has a key, by the normalised key: `partition_keys`.
-- A row matches a stored one when a way that applies matches. `partition_development` keeps the
-- labelled and key identities of the partition's development rows, so a later test partition
-- on another file can tell whether its rows were developed on. All are chained with every run
-- on the partition (sections hashed only when they hold rows).
CREATE TABLE partition_labels (
    partition_id  TEXT NOT NULL REFERENCES partitions(id),
    label_id      BLOB NOT NULL,             -- 16 bytes of SHA-256 of the feature identity and the target
    PRIMARY KEY (partition_id, label_id)
) STRICT, WITHOUT ROWID;

CREATE TABLE partition_keys (
    partition_id  TEXT NOT NULL REFERENCES partitions(id),
    key_id        BLOB NOT NULL,             -- 16 bytes of SHA-256 of the normalised key
    PRIMARY KEY (partition_id, key_id)
) STRICT, WITHOUT ROWID;

CREATE TABLE partition_development (
    partition_id  TEXT PRIMARY KEY REFERENCES partitions(id),
    label_ids     BLOB NOT NULL,             -- the development rows' labelled identities, 16 bytes each, sorted, distinct
    key_ids       BLOB                       -- their key identities, likewise (NULL without a key)
) STRICT;
