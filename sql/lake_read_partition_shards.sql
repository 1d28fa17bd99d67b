-- One experiment's bids of one day with the shard of each bid's auction: a stable hash of the
-- auction id (the first 8 hex digits of md5 of the id as text, as an integer, modulo $n_shards: the
-- estimators' `shard_of`), so every auction lands in one shard, the same on every engine and every
-- rerun. The caller streams the rows into one folder per shard. The filter on the partition column
-- `ds` prunes the scan to that day's files.
with source as (
    select *
    from read_parquet($lake_glob, hive_partitioning = true, union_by_name = true)
    where ds = $ds
)

select
    *,
    cast('0x' || left(md5(cast(auction_id as varchar)), 8) as ubigint) % $n_shards as shard
from source
where experiment_id = $experiment_id
