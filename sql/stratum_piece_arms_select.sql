-- Arm rows of the stored stratum pieces of one experiment on the days $days (a list).
select
    experiment_id, ds, n_bidders, segment, shard, arm_index, arm, revenue_per_auction, welfare_per_auction,
    n_auctions, realized_revenue_sum, realized_revenue_squares, what_if, own_variance
from {{ schema }}.stratum_piece_arms
where experiment_id = $experiment_id
    and list_contains($days, ds)
order by ds, n_bidders, segment nulls first, shard, arm_index
