-- Schema version 7, step 5 of 5 for arm_estimates: its key, segment included (experiment_id, ds, arm, metric, segment).
-- A unique index on expressions: the pooled rows (segment null) are one key value, a segment
-- labelled '' another; a primary key could not hold the null segment.
create unique index arm_estimates_key on {{ schema }}.arm_estimates (
    experiment_id, ds, arm, metric, (segment is null), coalesce(segment, '')
)
