-- Schema version 7, step 1 of 5 for stratum_piece_arms: the same table with a `segment` column (the
-- experiment's segment label, docs/method.md "Segments"; null on pooled rows and on every row of
-- an experiment without segments), built beside the version-6 table (DuckDB cannot change a
-- primary key in place), filled by results_v7_copy_stratum_piece_arms, swapped in, then keyed by results_v7_index_stratum_piece_arms.
-- The key is a unique index, not a primary key: a primary key column cannot be null, and
-- `segment` is null on the pooled rows. The index holds (segment is null, coalesce(segment, '')),
-- so the pooled rows are one key value and a segment labelled '' (an empty string in the log)
-- stays another (results_v7_index_stratum_piece_arms).
-- Per stratum piece, each target's estimates and the realized per-arm average's sums; the last row
-- (arm_index = number of targets) is the mixture that ran.
create table {{ schema }}.stratum_piece_arms_next (
    experiment_id varchar not null,
    ds date not null,
    n_bidders integer not null,
    segment varchar,
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
    -- a layout that did not run (version 5), and its weights' variance against themselves
    what_if boolean,
    own_variance double
)
