-- Schema version 4, step 1 of 4 for arm_estimates_to_date: the same table, except that an
-- (experiment, day) whose window has no day yet (warm-up, burn-in, excluded days) gets rows too:
-- estimate null, status naming why (warming_up, ...), first_ds null and n_days_used 0. Built beside
-- the version-3 table (DuckDB cannot alter a check constraint in place), filled by
-- results_v4_copy_arm_estimates_to_date, then swapped in.
-- Experiment-to-date estimates: the stored stratum pieces of the days in the analysis window
-- through ds, combined by auction counts (the auction-weighted average over days of each day's
-- counterfactual; no bids re-read). One set of rows per (experiment, ds), from the first day on; first_ds is the
-- first day used (null before any), and the rows name the days used and the days left out (with the reason).
create table {{ schema }}.arm_estimates_to_date_next (
    experiment_id varchar not null,
    ds date not null,
    first_ds date,  -- null while no day of the window is used
    arm varchar not null,
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
    -- the analysis window: runs of days as text ('2026-03-04..2026-03-09,2026-03-12'); left-out
    -- runs carry their reason ('2026-03-02..2026-03-03 (warmup)'; burn_in, excluded, drift, warmup)
    days_used varchar not null,
    days_left_out varchar not null,
    n_days_used integer not null check (n_days_used >= 0),
    n_days_left_out integer not null check (n_days_left_out >= 0),
    -- anytime-valid bounds (version 3): null where the row has no standard error, and on rows without numbers
    anytime_low double,
    anytime_high double,
    anytime_horizon_auctions bigint,
    primary key (experiment_id, ds, arm, metric)
)
