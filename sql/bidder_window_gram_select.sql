-- The window's sum of U_b U_b' of one experiment, long (one row per pair of revenue labels).
select
    arm_i, arm_j, value
from {{ schema }}.bidder_window_gram
where experiment_id = $experiment_id
order by arm_i, arm_j
