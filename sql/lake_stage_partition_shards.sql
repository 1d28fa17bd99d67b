-- Stage one experiment's bids of one day, split into $n_shards shards by a stable hash of the
-- auction id: <folder>/shard=K/*.parquet. The hash is the first 8 hex digits of md5 of the id as
-- text, read as an integer, modulo the number of shards (the estimators' `shard_of`), so every
-- auction lands in one shard, the same on every engine and every rerun. DuckDB writes the
-- partitions as it scans, spilling to disk, so memory does not grow with the day.
copy (
    with source as (
        select *
        from read_parquet($lake_glob, hive_partitioning = true, union_by_name = true)
        where ds = $ds
    ),

    sharded as (
        select
            *,
            cast('0x' || left(md5(cast(auction_id as varchar)), 8) as ubigint) % $n_shards as shard
        from source
        where experiment_id = $experiment_id
    )

    select *
    from sharded
) to $folder (format parquet, partition_by (shard))
