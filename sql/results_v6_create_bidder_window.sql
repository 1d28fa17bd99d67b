-- The running bidder totals of one experiment's analysis window (one row per experiment): which
-- days they cover and what bidder clustering needs besides them. Kept so that a day's to-date rows
-- read only today's bidders' totals (counterbid.estimators.window_totals); rebuilt from the stored
-- pieces whenever the window is not the stored one plus today.
create table if not exists {{ schema }}.bidder_window (
    experiment_id varchar not null primary key,
    -- last day covered, and every day covered (ISO, comma-joined, ascending)
    ds date not null,
    days_used varchar not null,
    -- distinct bidders B of the window (the factor B / (B - 1))
    n_distinct_bidders bigint not null check (n_distinct_bidders >= 0),
    -- unit of the totals: 2^bid_exponent bids
    bid_exponent integer not null,
    run_id varchar not null,
    computed_at timestamptz not null
)
