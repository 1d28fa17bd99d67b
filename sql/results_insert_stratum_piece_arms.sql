-- Second half of the replace: insert the registered relation `incoming` (the pieces' arm rows).
insert into {{ schema }}.stratum_piece_arms (
    experiment_id, ds, n_bidders, shard, arm_index, arm, revenue_per_auction, welfare_per_auction,
    n_auctions, realized_revenue_sum, realized_revenue_squares, run_id, computed_at, what_if, own_variance, segment
)
select
    experiment_id, ds, n_bidders, shard, arm_index, arm, revenue_per_auction, welfare_per_auction,
    n_auctions, realized_revenue_sum, realized_revenue_squares, run_id, computed_at, what_if, own_variance, segment
from incoming
where experiment_id = $experiment_id
    and ds = $ds
