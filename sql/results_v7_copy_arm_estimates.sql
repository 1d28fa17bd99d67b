-- Schema version 7, step 2 of 5 for arm_estimates: copy every version-6 row; none had segments (segment null).
insert into {{ schema }}.arm_estimates_next (
    experiment_id, ds, arm, metric, estimate, std_error, ci_low, ci_high,
    n_auctions, n_bids, status, confidence_level, cluster, payment_rule, floor, method_version, run_id, computed_at,
    what_if, effective_share
)
select
    experiment_id, ds, arm, metric, estimate, std_error, ci_low, ci_high,
    n_auctions, n_bids, status, confidence_level, cluster, payment_rule, floor, method_version, run_id, computed_at,
    what_if, effective_share
from {{ schema }}.arm_estimates
