-- Second half of the replace: insert the registered relation `incoming` (the pieces' covariances).
insert into {{ schema }}.stratum_piece_covariance (
    experiment_id, ds, n_bidders, shard, arm_i, metric_i, arm_j, metric_j, value, run_id, computed_at, segment
)
select
    experiment_id, ds, n_bidders, shard, arm_i, metric_i, arm_j, metric_j, value, run_id, computed_at, segment
from incoming
where experiment_id = $experiment_id
    and ds = $ds
