-- Schema version 10, step 1 of 4 for bidder_window_totals: one row per (experiment, segment, bidder)
-- holding every revenue label's running total U_b in one list column, instead of one row per
-- (bidder, label). Built beside the version-9 table, filled by results_v10_copy_bidder_window_totals,
-- then swapped in. No key (a day replaces its bidders' rows: delete, then insert, in one transaction).
create table {{ schema }}.bidder_window_totals_next (
    experiment_id varchar not null,
    -- the segment whose bidders the totals add (null: every segment together)
    segment varchar,
    -- 63 bits of the md5 of bidder_id (its first 16 hex digits, shifted right by one): what a day's
    -- bidders are looked up by, an integer column instead of the id text
    bidder_key bigint not null,
    bidder_id varchar not null,
    -- U_b of each revenue label, in the order of bidder_window.sum_labels
    sums double[] not null
)
