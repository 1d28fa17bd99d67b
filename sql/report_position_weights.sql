-- Position weights used on the latest day of one experiment (spec or measured).
with source as (
    select arm, position, weight, source, impressions, clicks, first_click_ds, ds
    from {{ schema }}.arm_position_weights
    where experiment_id = $experiment_id
),

latest as (
    select max(ds) as ds
    from source
)

select source.arm, source.position, source.weight, source.source, source.impressions, source.clicks,
    source.first_click_ds, source.ds
from source
inner join latest on source.ds = latest.ds
order by source.arm, source.position
