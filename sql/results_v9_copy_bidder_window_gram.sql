-- Schema version 9, step 2 of 5 for bidder_window_gram: copy every version-8 row (pooled: segment null).
insert into {{ schema }}.bidder_window_gram_next (experiment_id, arm_i, arm_j, value)
select experiment_id, arm_i, arm_j, value
from {{ schema }}.bidder_window_gram
