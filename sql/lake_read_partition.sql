-- One experiment's bids of one day from the Hive-partitioned bid lake.
-- The filter on the partition column `ds` prunes the scan to that day's files.
with source as (
    select *
    from read_parquet($lake_glob, hive_partitioning = true, union_by_name = true)
    where ds = $ds
)

select *
from source
where experiment_id = $experiment_id
