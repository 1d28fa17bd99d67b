-- Schema version 1 (counterbid before the interval's level and clustering were stored).
-- Daily per-arm estimates: one row per (experiment, day, arm, metric), from that day's bids.
create table if not exists {{ schema }}.arm_estimates (
    experiment_id varchar not null,
    ds date not null,
    arm varchar not null,
    metric varchar not null,
    estimate double,
    std_error double,
    ci_low double,
    ci_high double,
    n_auctions bigint not null,
    n_bids bigint not null,
    status varchar not null check (status in ('ok', 'warning')),
    method_version varchar not null,
    run_id varchar not null,
    computed_at timestamptz not null,
    primary key (experiment_id, ds, arm, metric)
)
