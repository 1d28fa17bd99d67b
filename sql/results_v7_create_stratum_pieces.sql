-- Schema version 7, step 1 of 5 for stratum_pieces: the same table with a `segment` column (the
-- experiment's segment label, docs/method.md "Segments"; null on pooled rows and on every row of
-- an experiment without segments), built beside the version-6 table (DuckDB cannot change a
-- primary key in place), filled by results_v7_copy_stratum_pieces, swapped in, then keyed by results_v7_index_stratum_pieces.
-- The key is a unique index, not a primary key: a primary key column cannot be null, and
-- `segment` is null on the pooled rows. The index holds (segment is null, coalesce(segment, '')),
-- so the pooled rows are one key value and a segment labelled '' (an empty string in the log)
-- stays another (results_v7_index_stratum_pieces).
-- One row per (experiment, day, number of bidders, segment, shard): what the stratum contributes.
create table {{ schema }}.stratum_pieces_next (
    experiment_id varchar not null,
    ds date not null,
    n_bidders integer not null check (n_bidders >= 2),
    -- the stratum's segment label (null: the experiment declares no segments)
    segment varchar,
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
    computed_at timestamptz not null
)
