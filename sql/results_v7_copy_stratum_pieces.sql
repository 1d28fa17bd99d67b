-- Schema version 7, step 2 of 5 for stratum_pieces: copy every version-6 row; none had segments (segment null).
insert into {{ schema }}.stratum_pieces_next (
    experiment_id, ds, n_bidders, shard, n_auctions, n_bids, max_bid, bid_exponent, floor_quantile,
    has_quality, flags, n_distinct_bidders, run_id, computed_at
)
select
    experiment_id, ds, n_bidders, shard, n_auctions, n_bids, max_bid, bid_exponent, floor_quantile,
    has_quality, flags, n_distinct_bidders, run_id, computed_at
from {{ schema }}.stratum_pieces
