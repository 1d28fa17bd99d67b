-- Worst data-check outcome per day of one experiment, from the data-checks table:
-- 'error' or 'warning' when a check of that severity failed, else 'passed'; and how many checks ran
-- on a hash sample of the day's auctions (their details hold a "sample" entry: a day in several shards).
with source as (
    select
        ds,
        severity,
        passed,
        strpos(cast(details as varchar), '"sample":') > 0 as on_sample
    from {{ schema }}.data_checks
    where experiment_id = $experiment_id
),

ranked as (
    select
        ds,
        max(case when passed then 0 when severity = 'error' then 2 else 1 end) as worst,
        count(*) as n_checks,
        count(*) filter (where not passed) as n_failed,
        count(*) filter (where on_sample) as n_on_sample
    from source
    group by ds
)

select
    ds,
    case worst when 2 then 'error' when 1 then 'warning' else 'passed' end as worst_status,
    n_checks,
    n_failed,
    n_on_sample
from ranked
order by ds
