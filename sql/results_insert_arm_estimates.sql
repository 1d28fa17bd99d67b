-- Second half of the replace: insert the registered relation `incoming`, one row per key
-- (duplicate keys inside one batch are dropped here, keeping the most recent computation).
insert into {{ schema }}.arm_estimates (
    experiment_id, ds, arm, metric, estimate, std_error, ci_low, ci_high,
    n_auctions, n_bids, status, confidence_level, cluster, payment_rule, floor, method_version, run_id, computed_at,
    what_if, effective_share, segment
)
select
    experiment_id, ds, arm, metric, estimate, std_error, ci_low, ci_high,
    n_auctions, n_bids, status, confidence_level, cluster, payment_rule, floor, method_version, run_id, computed_at,
    what_if, effective_share, segment
from incoming
where experiment_id = $experiment_id
    and ds = $ds
qualify row_number() over (partition by experiment_id, ds, arm, segment, metric order by computed_at desc) = 1
