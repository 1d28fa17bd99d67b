-- The bidder id of every bid of a bid log as a 64-bit key (DuckDB's `hash` of the id text), in the
-- log's row order: `$files` lists the log's Parquet files in the order the caller reads the other
-- columns (insertion order is kept). Only the keys reach the caller, never the text; a null id stays
-- null (`hash` of null is a number), so the caller can leave such a log to the plain reader, which
-- names the row. The key is compared only within one command run.
select case when bidder_id is null then null else hash(bidder_id) end as bidder_key
from read_parquet($files, union_by_name = true)
