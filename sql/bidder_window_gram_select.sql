-- The window's sum of U_b U_b' of one experiment, long (one row per segment and pair of revenue
-- labels; segment null: the pooled form).
select
    segment, arm_i, arm_j, value
from {{ schema }}.bidder_window_gram
where experiment_id = $experiment_id
order by segment nulls first, arm_i, arm_j
