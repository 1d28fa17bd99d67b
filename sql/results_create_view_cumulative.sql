-- Current experiment-to-date estimates: the latest day of each experiment's to-date rows.
create or replace view {{ schema }}.arm_estimates_cumulative as
with latest as (
    select *
    from {{ schema }}.arm_estimates_to_date
    qualify ds = max(ds) over (partition by experiment_id)
)

select *
from latest
