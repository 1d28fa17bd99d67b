-- Schema version 7, step 5 of 5 for stratum_piece_arms: its key, segment included (experiment_id, ds, n_bidders, shard, arm_index, segment).
-- A unique index on expressions: the pooled rows (segment null) are one key value, a segment
-- labelled '' another; a primary key could not hold the null segment.
create unique index stratum_piece_arms_key on {{ schema }}.stratum_piece_arms (
    experiment_id, ds, n_bidders, shard, arm_index, (segment is null), coalesce(segment, '')
)
