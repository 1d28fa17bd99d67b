-- Stored check outcomes of one (experiment, day), failures first.
select
    experiment_id,
    ds,
    "check",
    severity,
    passed,
    observed,
    threshold,
    cast(details as varchar) as details,
    run_id,
    checked_at
from {{ schema }}.data_checks
where experiment_id = $experiment_id
    and ds = $ds
order by passed, case severity when 'error' then 0 else 1 end, "check"
