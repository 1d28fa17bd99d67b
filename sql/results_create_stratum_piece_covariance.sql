-- Per stratum piece, the auction-clustered covariance of its estimates (no small-sample factor),
-- upper triangle in long form: one row per pair of (arm, metric) labels with a finite entry.
create table if not exists {{ schema }}.stratum_piece_covariance (
    experiment_id varchar not null,
    ds date not null,
    n_bidders integer not null,
    shard integer not null,
    arm_i varchar not null,
    metric_i varchar not null,
    arm_j varchar not null,
    metric_j varchar not null,
    value double not null,
    run_id varchar not null,
    computed_at timestamptz not null,
    primary key (experiment_id, ds, n_bidders, shard, arm_i, metric_i, arm_j, metric_j)
)
