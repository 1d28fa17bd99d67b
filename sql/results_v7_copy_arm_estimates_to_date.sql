-- Schema version 7, step 2 of 5 for arm_estimates_to_date: copy every version-6 row; none had segments (segment null).
insert into {{ schema }}.arm_estimates_to_date_next (
    experiment_id, ds, first_ds, arm, metric, estimate, std_error, ci_low, ci_high,
    n_auctions, n_bids, status, confidence_level, cluster, payment_rule, floor, method_version, run_id, computed_at,
    days_used, days_left_out, n_days_used, n_days_left_out, anytime_low, anytime_high, anytime_horizon_auctions,
    what_if, effective_share
)
select
    experiment_id, ds, first_ds, arm, metric, estimate, std_error, ci_low, ci_high,
    n_auctions, n_bids, status, confidence_level, cluster, payment_rule, floor, method_version, run_id, computed_at,
    days_used, days_left_out, n_days_used, n_days_left_out, anytime_low, anytime_high, anytime_horizon_auctions,
    what_if, effective_share
from {{ schema }}.arm_estimates_to_date
