-- One experiment's bids of one day with the shard of each bid's auction: a stable hash of the
-- auction id (the first 8 hex digits of md5 of the id as text, as an integer, modulo $n_shards: the
-- estimators' `shard_of`), so every auction lands in one shard, the same on every engine and every
-- rerun. The caller streams the rows into one folder per shard. A bid without an auction id goes to
-- shard 0, whose validation refuses it by its row (md5 of null is null: it would otherwise fall in no
-- shard). The filter on the partition column `ds` prunes the scan to that day's files.
with source as (
    select *
    from read_parquet($lake_glob, hive_partitioning = true, union_by_name = true)
    where ds = $ds
)

select
    *,
    coalesce(cast('0x' || left(md5(cast(auction_id as varchar)), 8) as ubigint) % $n_shards, 0) as shard
from source
where experiment_id = $experiment_id
