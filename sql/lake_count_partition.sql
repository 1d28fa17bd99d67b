-- Bids of one experiment on one day in the Hive-partitioned bid lake (sets the number of shards).
-- The filter on the partition column `ds` prunes the scan to that day's files.
with source as (
    select experiment_id
    from read_parquet($lake_glob, hive_partitioning = true, union_by_name = true)
    where ds = $ds
)

select count(*) as n_bids
from source
where experiment_id = $experiment_id
