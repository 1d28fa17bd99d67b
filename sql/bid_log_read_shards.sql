-- A bid log (a Parquet file, or a glob of a Hive-partitioned folder) with the shard of each bid's
-- auction, as the pipeline's load step computes it for the lake (first 8 hex digits of md5 of the
-- id as text, as an integer, modulo $n_shards: the estimators' `shard_of`). The caller streams the
-- rows into one folder per shard. A bid without an auction id goes to shard 0, whose validation
-- refuses it by its row (md5 of null is null: it would otherwise fall in no shard).
with source as (
    select *
    from read_parquet($files, hive_partitioning = $hive, union_by_name = true)
)

select
    *,
    coalesce(cast('0x' || left(md5(cast(auction_id as varchar)), 8) as ubigint) % $n_shards, 0) as shard
from source
