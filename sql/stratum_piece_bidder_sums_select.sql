-- Bidder sums of the stored stratum pieces of one experiment on the days $days (a list), in one
-- order every engine gives (by day, stratum, segment, shard, bidder and arm), so that a combination
-- read back from any sink adds them in the same order.
select
    experiment_id, ds, n_bidders, segment, shard, bidder_id, arm, value
from {{ schema }}.stratum_piece_bidder_sums
where experiment_id = $experiment_id
    and list_contains($days, ds)
order by ds, n_bidders, segment nulls first, shard, bidder_id, arm
