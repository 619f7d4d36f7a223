-- Schema version 7: partition_rows keeps only its primary key (partition, row identity).
-- The second index, by row identity alone, held every row a second time: a run whose test
-- partition has 200,000 rows wrote about 8.7 MB more and spent a third of its partition write
-- on it. The lookups by identity alone (rows of a file to predict that are sealed test rows;
-- test rows two partitions share, for audit) now go partition by partition over the primary
-- key. Rows are unchanged, so the chain's values are too.

DROP INDEX IF EXISTS partition_rows_by_key;
