-- Schema version 9: row identity version 3.
-- A version-3 partition identifies a row by its feature cells (by column name, numbers to ten
-- significant digits; `partition_rows` holds its test rows' feature identities) and, when the
-- spec has a key, also by its key (normalised; `partition_keys`). A row matches when either
-- matches. `partition_development` keeps the identities of the partition's development rows,
-- so a later test partition on another file can tell whether its rows were developed on.
-- Both are chained with every run on the partition (sections hashed only when they hold rows).
CREATE TABLE partition_keys (
    partition_id  TEXT NOT NULL REFERENCES partitions(id),
    key_id        BLOB NOT NULL,             -- 16 bytes of SHA-256 of the normalised key
    PRIMARY KEY (partition_id, key_id)
) STRICT, WITHOUT ROWID;

CREATE TABLE partition_development (
    partition_id  TEXT PRIMARY KEY REFERENCES partitions(id),
    row_ids       BLOB NOT NULL,             -- the development rows' feature identities, 16 bytes each, sorted, distinct
    key_ids       BLOB                       -- their key identities, likewise (NULL without a key)
) STRICT;
