-- Second half of the replace: insert the registered relation `incoming` (the pieces' bidder sums,
-- in the order they were written: the order the combination reads them back in).
insert into {{ schema }}.stratum_piece_bidder_sums (
    experiment_id, ds, n_bidders, shard, bidder_id, arm, value, run_id, computed_at, segment
)
select
    experiment_id, ds, n_bidders, shard, bidder_id, arm, value, run_id, computed_at, segment
from incoming
where experiment_id = $experiment_id
    and ds = $ds
