-- Measured position weights: clicks / impressions per (arm, position), pooled over the trailing
-- window [$first_ds, $ds] of the click log (Hive-partitioned by ds).
with source as (
    select
        cast(arm as varchar) as arm,
        cast(position as integer) as position,
        impressions,
        clicks
    from read_parquet($clicks_glob, hive_partitioning = true, union_by_name = true)
    where ds between $first_ds and $ds
        and experiment_id = $experiment_id
),

pooled as (
    select
        arm,
        position,
        sum(impressions) as impressions,
        sum(clicks) as clicks
    from source
    where position >= 1
    group by arm, position
)

select
    arm,
    position,
    cast(impressions as bigint) as impressions,
    cast(clicks as bigint) as clicks,
    -- a position never shown in the window has no measured weight (null, not 0/0)
    case when impressions > 0 then clicks / impressions end as weight
from pooled
order by arm, position
