-- Stored stratum pieces of one experiment on the days $days (a list), in a stable order.
select
    experiment_id, ds, n_bidders, segment, shard, n_auctions, n_bids, max_bid, bid_exponent, floor_quantile,
    has_quality, flags, n_distinct_bidders
from {{ schema }}.stratum_pieces
where experiment_id = $experiment_id
    and list_contains($days, ds)
order by ds, n_bidders, segment nulls first, shard
