-- Bidder sums of the stored stratum pieces of one experiment on the days $days (a list), for the
-- rebuild of the running bidder window: streamed in record batches and in no particular order (the
-- rebuild sets each row aside by its bidder's bucket and orders a bucket's rows by their piece), so
-- the sink scans without sorting the window.
select
    ds, n_bidders, segment, shard, bidder_id, arm, value
from {{ schema }}.stratum_piece_bidder_sums
where experiment_id = $experiment_id
    and list_contains($days, ds)
