-- Daily estimates of one experiment, oldest day first, for the report.
select *
from {{ schema }}.arm_estimates
where experiment_id = $experiment_id
order by ds, segment nulls first, arm, metric
