-- Days of one experiment before $ds on which a check of $checks (a list: warm-up and drift by
-- default) failed, from the stored outcomes: the experiment-to-date combination leaves them out.
with source as (
    select ds, "check"
    from {{ schema }}.data_checks
    where experiment_id = $experiment_id
        and ds < $ds
        and not passed
        and list_contains($checks, "check")
)

select
    ds,
    string_agg("check", ',' order by "check") as failed_checks
from source
group by ds
order by ds
