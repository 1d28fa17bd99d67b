-- Second half of the replace: insert the registered relation `incoming`, one row per key
-- (duplicate keys inside one batch are dropped here, keeping the most recent computation).
insert into {{ schema }}.arm_estimates_to_date (
    experiment_id, ds, first_ds, arm, metric, estimate, std_error, ci_low, ci_high,
    n_auctions, n_bids, status, confidence_level, cluster, payment_rule, floor, method_version, run_id, computed_at,
    days_used, days_left_out, n_days_used, n_days_left_out, anytime_low, anytime_high, anytime_horizon_auctions,
    what_if, effective_share, segment
)
select
    experiment_id, ds, first_ds, arm, metric, estimate, std_error, ci_low, ci_high,
    n_auctions, n_bids, status, confidence_level, cluster, payment_rule, floor, method_version, run_id, computed_at,
    days_used, days_left_out, n_days_used, n_days_left_out, anytime_low, anytime_high, anytime_horizon_auctions,
    what_if, effective_share, segment
from incoming
where experiment_id = $experiment_id
    and ds = $ds
qualify row_number() over (partition by experiment_id, ds, arm, segment, metric order by computed_at desc) = 1
