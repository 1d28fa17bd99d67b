-- Covariance rows of the stored stratum pieces of one experiment on the days $days (a list).
select
    experiment_id, ds, n_bidders, segment, shard, arm_i, metric_i, arm_j, metric_j, value
from {{ schema }}.stratum_piece_covariance
where experiment_id = $experiment_id
    and list_contains($days, ds)
order by ds, n_bidders, segment nulls first, shard, arm_i, metric_i, arm_j, metric_j
