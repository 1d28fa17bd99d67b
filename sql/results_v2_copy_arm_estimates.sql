-- Schema version 2, step 2 of 4 for arm_estimates: copy every version-1 row. Version 1 did not store the
-- interval's confidence level and clustering; its intervals were 95 % clustered by auction (the
-- defaults of that version), which the copied rows record; it modelled pay-your-bid per click with no
-- floor, so its rows record payment rule 'first_price' and floor 0.
insert into {{ schema }}.arm_estimates_next (
    experiment_id, ds, arm, metric, estimate, std_error, ci_low, ci_high,
    n_auctions, n_bids, status, confidence_level, cluster, payment_rule, floor, method_version, run_id, computed_at
)
select
    experiment_id, ds, arm, metric, estimate, std_error, ci_low, ci_high,
    n_auctions, n_bids, status, 0.95 as confidence_level, 'auction' as cluster,
    'first_price' as payment_rule, 0.0 as floor, method_version, run_id, computed_at
from {{ schema }}.arm_estimates
