-- What each stratum of a day contributes to the estimates: one row per (experiment, day, number
-- of bidders, shard). With the arms, covariance and bidder-sum tables it is everything the daily
-- and experiment-to-date rows are combined from (counterbid.estimators.pieces), so no step
-- re-reads an earlier day's bids.
create table if not exists {{ schema }}.stratum_pieces (
    experiment_id varchar not null,
    ds date not null,
    n_bidders integer not null check (n_bidders >= 2),
    -- stable hash shard of the auction ids (0 when the day was not split)
    shard integer not null check (shard >= 0),
    -- the combine weight: auctions of the stratum
    n_auctions bigint not null check (n_auctions >= 1),
    n_bids bigint not null check (n_bids >= 2),
    -- largest effective bid, and the piece's unit (2^bid_exponent bids; 0 unless bids are extreme)
    max_bid double not null,
    bid_exponent integer not null,
    -- estimated quantile of the floor (NaN without a floor)
    floor_quantile double,
    has_quality boolean not null,
    -- the stratum's own flags (few_bids, degenerate, not_identified), comma-joined; '' for none
    flags varchar not null,
    -- distinct bidders whose influence sums are kept (-1: none kept, clustered by auction)
    n_distinct_bidders bigint not null,
    run_id varchar not null,
    computed_at timestamptz not null,
    primary key (experiment_id, ds, n_bidders, shard)
)
