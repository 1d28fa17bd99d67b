-- Schema version 2, step 2 of 4 for arm_estimates_to_date: copy every version-1 row. Version 1 did not store the
-- interval's confidence level and clustering; its intervals were 95 % clustered by auction (the
-- defaults of that version), which the copied rows record; it modelled pay-your-bid per click with no
-- floor, so its rows record payment rule 'first_price' and floor 0.
insert into {{ schema }}.arm_estimates_to_date_next (
    experiment_id, ds, first_ds, arm, metric, estimate, std_error, ci_low, ci_high,
    n_auctions, n_bids, status, confidence_level, cluster, payment_rule, floor, method_version, run_id, computed_at,
    days_used, days_left_out, n_days_used, n_days_left_out
)
select
    experiment_id, ds, first_ds, arm, metric, estimate, std_error, ci_low, ci_high,
    n_auctions, n_bids, status, 0.95 as confidence_level, 'auction' as cluster,
    'first_price' as payment_rule, 0.0 as floor, method_version, run_id, computed_at,
    -- version 1 pooled every day from first_ds through ds: all of them were used
    cast(first_ds as varchar) || '..' || cast(ds as varchar) as days_used, '' as days_left_out,
    cast(ds - first_ds as integer) + 1 as n_days_used, 0 as n_days_left_out
from {{ schema }}.arm_estimates_to_date
