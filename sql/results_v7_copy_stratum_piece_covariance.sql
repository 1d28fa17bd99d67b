-- Schema version 7, step 2 of 5 for stratum_piece_covariance: copy every version-6 row; none had segments (segment null).
insert into {{ schema }}.stratum_piece_covariance_next (
    experiment_id, ds, n_bidders, shard, arm_i, metric_i, arm_j, metric_j, value, run_id, computed_at
)
select
    experiment_id, ds, n_bidders, shard, arm_i, metric_i, arm_j, metric_j, value, run_id, computed_at
from {{ schema }}.stratum_piece_covariance
