-- Split a bid log (a Parquet file, or a glob of a Hive-partitioned folder) into $n_shards shards
-- by the stable hash of the auction id: <folder>/shard=K/*.parquet, as the pipeline's load step
-- does for the lake (first 8 hex digits of md5 of the id as text, as an integer, modulo the
-- number of shards: the estimators' `shard_of`). DuckDB spills to disk rather than hold the log.
copy (
    with source as (
        select *
        from read_parquet($files, hive_partitioning = $hive, union_by_name = true)
    )

    select
        *,
        cast('0x' || left(md5(cast(auction_id as varchar)), 8) as ubigint) % $n_shards as shard
    from source
) to $folder (format parquet, partition_by (shard))
