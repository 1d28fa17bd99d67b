-- Schema version 7, step 2 of 5 for stratum_piece_arms: copy every version-6 row; none had segments (segment null).
insert into {{ schema }}.stratum_piece_arms_next (
    experiment_id, ds, n_bidders, shard, arm_index, arm, revenue_per_auction, welfare_per_auction,
    n_auctions, realized_revenue_sum, realized_revenue_squares, run_id, computed_at, what_if, own_variance
)
select
    experiment_id, ds, n_bidders, shard, arm_index, arm, revenue_per_auction, welfare_per_auction,
    n_auctions, realized_revenue_sum, realized_revenue_squares, run_id, computed_at, what_if, own_variance
from {{ schema }}.stratum_piece_arms
