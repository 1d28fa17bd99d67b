-- One experiment's bids of every day from $first_ds through $ds (experiment-to-date pool).
-- The range filter on the partition column `ds` prunes the scan to those days' files.
with source as (
    select *
    from read_parquet($lake_glob, hive_partitioning = true, union_by_name = true)
    where ds between $first_ds and $ds
)

select *
from source
where experiment_id = $experiment_id
