-- Schema version 7, step 1 of 5 for stratum_piece_covariance: the same table with a `segment` column (the
-- experiment's segment label, docs/method.md "Segments"; null on pooled rows and on every row of
-- an experiment without segments), built beside the version-6 table (DuckDB cannot change a
-- primary key in place), filled by results_v7_copy_stratum_piece_covariance, swapped in, then keyed by results_v7_index_stratum_piece_covariance.
-- The key is a unique index, not a primary key: a primary key column cannot be null, and
-- `segment` is null on the pooled rows. The index holds (segment is null, coalesce(segment, '')),
-- so the pooled rows are one key value and a segment labelled '' (an empty string in the log)
-- stays another (results_v7_index_stratum_piece_covariance).
-- Per stratum piece, the auction-clustered covariance of its estimates, upper triangle in long form.
create table {{ schema }}.stratum_piece_covariance_next (
    experiment_id varchar not null,
    ds date not null,
    n_bidders integer not null,
    segment varchar,
    shard integer not null,
    arm_i varchar not null,
    metric_i varchar not null,
    arm_j varchar not null,
    metric_j varchar not null,
    value double not null,
    run_id varchar not null,
    computed_at timestamptz not null
)
