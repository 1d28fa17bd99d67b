-- Experiments that have daily estimates.
select distinct experiment_id
from {{ schema }}.arm_estimates
order by experiment_id
