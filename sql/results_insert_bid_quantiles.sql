-- Second half of the replace: insert the registered relation `incoming`, one row per key
-- (duplicate keys inside one batch are dropped here, keeping the most recent computation).
insert into {{ schema }}.bid_quantiles (
    experiment_id, ds, n_bidders, n_bids, quantile_index, probability, bid, run_id, computed_at
)
select
    experiment_id, ds, n_bidders, n_bids, quantile_index, probability, bid, run_id, computed_at
from incoming
where experiment_id = $experiment_id
    and ds = $ds
qualify row_number() over (
    partition by experiment_id, ds, n_bidders, quantile_index order by computed_at desc
) = 1
