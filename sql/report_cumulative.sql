-- The current experiment-to-date table of every experiment.
select experiment_id, first_ds, ds, arm, metric, estimate, std_error, ci_low, ci_high, confidence_level, cluster, n_auctions, n_bids, status
from {{ schema }}.arm_estimates_cumulative
order by experiment_id, arm = '_mixture', arm, metric
