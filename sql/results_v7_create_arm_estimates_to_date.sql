-- Schema version 7, step 1 of 5 for arm_estimates_to_date: the same table with a `segment` column (the
-- experiment's segment label, docs/method.md "Segments"; null on pooled rows and on every row of
-- an experiment without segments), built beside the version-6 table (DuckDB cannot change a
-- primary key in place), filled by results_v7_copy_arm_estimates_to_date, swapped in, then keyed by results_v7_index_arm_estimates_to_date.
-- The key is a unique index, not a primary key: a primary key column cannot be null, and
-- `segment` is null on the pooled rows. The index holds (segment is null, coalesce(segment, '')),
-- so the pooled rows are one key value and a segment labelled '' (an empty string in the log)
-- stays another (results_v7_index_arm_estimates_to_date).
-- Experiment-to-date estimates: one set of rows per (experiment, ds), per segment and pooled.
create table {{ schema }}.arm_estimates_to_date_next (
    experiment_id varchar not null,
    ds date not null,
    first_ds date,  -- null while no day of the window is used
    arm varchar not null,
    segment varchar,
    metric varchar not null,
    estimate double,
    std_error double,
    ci_low double,
    ci_high double,
    n_auctions bigint not null,
    n_bids bigint not null,
    -- 'ok', or sorted comma-joined flags: 'warning' (a data check warned) and the estimator's own
    status varchar not null check (regexp_matches(status, '^[a-z][a-z_]*(,[a-z][a-z_]*)*$')),
    -- the interval's confidence level and the unit its standard errors were clustered on
    confidence_level double not null check (confidence_level > 0 and confidence_level < 1),
    cluster varchar not null check (cluster in ('auction', 'bidder')),
    -- the auction the bids came from: its payment rule and floor (0: none) enter the estimate
    payment_rule varchar not null check (payment_rule in ('first_price', 'gsp', 'vcg')),
    floor double not null check (floor >= 0),
    method_version varchar not null,
    run_id varchar not null,
    computed_at timestamptz not null,
    -- the analysis window: runs of days as text, left-out runs with their reason
    days_used varchar not null,
    days_left_out varchar not null,
    n_days_used integer not null check (n_days_used >= 0),
    n_days_left_out integer not null check (n_days_left_out >= 0),
    -- anytime-valid bounds (version 3): null where the row has no standard error, and on rows without numbers
    anytime_low double,
    anytime_high double,
    anytime_horizon_auctions bigint,
    -- a layout that did not run (version 5), and its effective share
    what_if boolean,
    effective_share double
)
