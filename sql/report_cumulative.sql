-- The current experiment-to-date table of every experiment.
select experiment_id, first_ds, ds, arm, segment, metric, estimate, std_error, ci_low, ci_high, confidence_level, cluster, n_auctions, n_bids, status,
    days_used, days_left_out, n_days_used, n_days_left_out, anytime_low, anytime_high, anytime_horizon_auctions,
    what_if, effective_share
from {{ schema }}.arm_estimates_cumulative
order by experiment_id, segment nulls first, arm = '_mixture', arm, metric
