-- Each day's bids summarised for the drift check of later days: quantiles at probabilities
-- k / 256 per (experiment, day, number of bidders), so no step re-reads an earlier day's bids.
create table if not exists {{ schema }}.bid_quantiles (
    experiment_id varchar not null,
    ds date not null,
    n_bidders integer not null check (n_bidders >= 2),
    -- the stratum's bids that day (the weight of this day's summary when days are pooled)
    n_bids bigint not null check (n_bids >= 1),
    quantile_index integer not null check (quantile_index >= 0),
    probability double not null check (probability >= 0 and probability <= 1),
    -- effective bid (bid x quality when the log has quality factors) at that probability
    bid double not null,
    run_id varchar not null,
    computed_at timestamptz not null,
    primary key (experiment_id, ds, n_bidders, quantile_index)
)
