-- The running window's sum of U_b U_b', pooled and per segment (the registered relation `incoming`).
insert into {{ schema }}.bidder_window_gram (experiment_id, segment, arm_i, arm_j, value)
select experiment_id, segment, arm_i, arm_j, value
from incoming
where experiment_id = $experiment_id
