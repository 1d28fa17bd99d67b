-- Per stratum piece, each arm's estimates and the realized per-arm average's sums; the last row
-- (arm_index = number of arms) is the mixture that ran.
create table if not exists {{ schema }}.stratum_piece_arms (
    experiment_id varchar not null,
    ds date not null,
    n_bidders integer not null,
    shard integer not null,
    arm_index integer not null check (arm_index >= 0),
    arm varchar not null,
    revenue_per_auction double,
    welfare_per_auction double,
    -- auctions of the arm in the stratum (the mixture row: every auction of the stratum)
    n_auctions bigint not null check (n_auctions >= 0),
    -- sum of the auctions' realized revenue and of its squared deviations from the arm's mean
    realized_revenue_sum double,
    realized_revenue_squares double,
    run_id varchar not null,
    computed_at timestamptz not null,
    primary key (experiment_id, ds, n_bidders, shard, arm_index)
)
