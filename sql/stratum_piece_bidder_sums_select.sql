-- Bidder sums of the stored stratum pieces of one experiment on the days $days (a list), each
-- piece's rows in the order they were written (rowid), so that a combination sums them in the
-- same order as the day it was computed on.
select
    experiment_id, ds, n_bidders, shard, bidder_id, arm, value
from {{ schema }}.stratum_piece_bidder_sums
where experiment_id = $experiment_id
    and list_contains($days, ds)
order by ds, n_bidders, shard, rowid
