-- Stored bid-quantile summaries of one experiment's trailing days [$first_day, $ds), for the
-- drift check of day $ds.
select
    ds,
    n_bidders,
    n_bids,
    quantile_index,
    probability,
    bid
from {{ schema }}.bid_quantiles
where experiment_id = $experiment_id
    and ds >= $first_day
    and ds < $ds
order by ds, n_bidders, quantile_index
