-- The running window's sum of U_b U_b' (the registered relation `incoming`).
insert into {{ schema }}.bidder_window_gram (experiment_id, arm_i, arm_j, value)
select experiment_id, arm_i, arm_j, value
from incoming
where experiment_id = $experiment_id
