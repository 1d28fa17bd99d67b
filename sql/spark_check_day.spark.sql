-- Spark SQL. One experiment's day (the view `counterbid_check_source`, with a `quality` column) as
-- the checks on Spark read it: every bid with the shard of its auction and the key of the 1-in-k
-- sample cut. The shard is the stable hash every engine uses (the first 8 hex digits of md5 of the
-- auction id as text, as an integer, modulo :n_shards; `sql/lake_read_partition_shards.sql`), the
-- cut key the next 8 hex digits of the same md5 as an integer (`sql/check_day_bids.sql`): whole
-- auctions either way. A bid without an auction id is in shard 0 with key 0.
select
    *,
    coalesce(pmod(cast(conv(substr(md5(cast(auction_id as string)), 1, 8), 16, 10) as bigint), :n_shards), 0)
        as check_shard,
    coalesce(cast(conv(substr(md5(cast(auction_id as string)), 9, 8), 16, 10) as bigint), 0) as cut_key
from counterbid_check_source
