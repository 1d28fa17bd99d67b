-- Schema version 9, step 1 of 5 for bidder_window: the same table with a `segment` column (the
-- experiment's segment label, docs/method.md "Segments"; null: the pooled window, and the only
-- window of an experiment without segments), built beside the version-6 table (DuckDB cannot
-- change a primary key in place), filled by results_v9_copy_bidder_window, swapped in, then keyed
-- by results_v9_index_bidder_window (the null segment as one key value, as in version 7).
-- One row per (experiment, segment): which days the running totals cover and their bidder count.
create table {{ schema }}.bidder_window_next (
    experiment_id varchar not null,
    -- the segment whose bidders the totals add (null: every segment together)
    segment varchar,
    -- last day covered, and every day covered (ISO, comma-joined, ascending); the same on every row of an experiment
    ds date not null,
    days_used varchar not null,
    -- distinct bidders B of the window (of the segment) (the factor B / (B - 1))
    n_distinct_bidders bigint not null check (n_distinct_bidders >= 0),
    -- unit of the totals: 2^bid_exponent bids
    bid_exponent integer not null,
    run_id varchar not null,
    computed_at timestamptz not null
)
