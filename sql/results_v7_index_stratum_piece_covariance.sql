-- Schema version 7, step 5 of 5 for stratum_piece_covariance: its key, segment included (experiment_id, ds, n_bidders, shard, arm_i, metric_i, arm_j, metric_j, segment).
-- A unique index on expressions: the pooled rows (segment null) are one key value, a segment
-- labelled '' another; a primary key could not hold the null segment.
create unique index stratum_piece_covariance_key on {{ schema }}.stratum_piece_covariance (
    experiment_id, ds, n_bidders, shard, arm_i, metric_i, arm_j, metric_j, (segment is null), coalesce(segment, '')
)
