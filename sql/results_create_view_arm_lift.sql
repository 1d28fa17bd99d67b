-- Revenue lift of each non-control arm over control, with its interval, per day ('day') and
-- experiment-to-date ('to_date'), beside the arm's own revenue per auction. To-date rows also carry
-- the anytime-valid bounds (hold at every daily look; null on 'day' rows and rows before version 3).
-- One row per segment and one pooled (segment null) when the experiment declares segments (version 7).
create or replace view {{ schema }}.arm_lift as
with daily as (
    select 'day' as span, experiment_id, ds, arm, segment, metric, estimate, std_error, ci_low, ci_high, confidence_level, cluster, status,
        cast(null as double) as anytime_low, cast(null as double) as anytime_high
    from {{ schema }}.arm_estimates
),

to_date as (
    select 'to_date' as span, experiment_id, ds, arm, segment, metric, estimate, std_error, ci_low, ci_high, confidence_level, cluster, status,
        anytime_low, anytime_high
    from {{ schema }}.arm_estimates_to_date
),

combined as (
    select * from daily
    union all
    select * from to_date
),

lift as (
    select * from combined where metric = 'revenue_lift_vs_control'
),

revenue as (
    select span, experiment_id, ds, arm, segment, estimate as revenue_per_auction
    from combined
    where metric = 'revenue_per_auction'
)

select
    lift.span,
    lift.experiment_id,
    lift.ds,
    lift.arm,
    lift.segment,
    lift.estimate as lift,
    lift.std_error,
    lift.ci_low,
    lift.ci_high,
    lift.confidence_level,
    lift.cluster,
    revenue.revenue_per_auction,
    lift.status,
    lift.anytime_low,
    lift.anytime_high
from lift
left join revenue
    on lift.span = revenue.span
    and lift.experiment_id = revenue.experiment_id
    and lift.ds = revenue.ds
    and lift.arm = revenue.arm
    and lift.segment is not distinct from revenue.segment
