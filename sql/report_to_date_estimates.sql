-- Experiment-to-date estimates of one experiment for every day, for the report.
select *
from {{ schema }}.arm_estimates_to_date
where experiment_id = $experiment_id
order by ds, segment nulls first, arm, metric
