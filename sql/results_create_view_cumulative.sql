-- Current experiment-to-date estimates: the latest day of each experiment's to-date rows.
create or replace view {{ schema }}.arm_estimates_cumulative as
with latest as (
    -- each experiment's last to-date day (a join, not `qualify`, so no helper column leaks
    -- into `select *` in dialects that rewrite `qualify` as a subquery)
    select experiment_id, max(ds) as ds
    from {{ schema }}.arm_estimates_to_date
    group by experiment_id
)

select to_date.*
from {{ schema }}.arm_estimates_to_date as to_date
inner join latest
    on to_date.experiment_id = latest.experiment_id
    and to_date.ds = latest.ds
