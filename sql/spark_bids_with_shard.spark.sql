-- Spark SQL. Each bid with the shard of its auction and its read-order key. The shard is the
-- stable hash every engine uses (the first 8 hex digits of md5 of the auction id as text, as an
-- integer, modulo :n_shards: the estimators' `shard_of`, DuckDB's
-- `sql/lake_read_partition_shards.sql`); a bid without an auction id goes to shard 0, whose worker
-- refuses it by its row. The read-order key is the rank of the bid's file
-- (`counterbid_bid_files`, ranked by path on the driver) shifted left by :row_bits, plus the
-- bid's row in its file.
select /*+ BROADCAST(f) */
    b.*,
    coalesce(pmod(cast(conv(substr(md5(cast(b.auction_id as string)), 1, 8), 16, 10) as bigint), :n_shards), 0) as shard,
    shiftleft(f.file_rank, :row_bits) + b.bid_row as bid_order
from counterbid_bids as b
join counterbid_bid_files as f
    on b.bid_file = f.bid_file
