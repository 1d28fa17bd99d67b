-- Second half of the replace: insert the registered relation `incoming` (the day's pieces).
insert into {{ schema }}.stratum_pieces (
    experiment_id, ds, n_bidders, shard, n_auctions, n_bids, max_bid, bid_exponent, floor_quantile,
    has_quality, flags, n_distinct_bidders, run_id, computed_at, segment
)
select
    experiment_id, ds, n_bidders, shard, n_auctions, n_bids, max_bid, bid_exponent, floor_quantile,
    has_quality, flags, n_distinct_bidders, run_id, computed_at, segment
from incoming
where experiment_id = $experiment_id
    and ds = $ds
