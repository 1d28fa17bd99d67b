-- Spark SQL. Each bid of an input read from a single file, with the shard of its auction and its
-- read-order key. The shard is the stable hash of `spark_bids_with_shard.spark.sql` (the first 8 hex
-- digits of md5 of the auction id as text, as an integer, modulo :n_shards; 0 without an auction id);
-- with one file to rank, the read-order key is the bid's row in that file, so the file's name is
-- neither read per row nor joined.
select
    b.*,
    coalesce(pmod(cast(conv(substr(md5(cast(b.auction_id as string)), 1, 8), 16, 10) as bigint), :n_shards), 0) as shard,
    b.bid_row as bid_order
from counterbid_bids as b
