-- Running totals of the (segment, bidder) pairs in the temporary table `incoming` (today's, or
-- every pair of the window when it is rebuilt; segment null: pooled), one row per pair with every
-- revenue label's total in `sums` (order: the window's sum_labels); the integer key is computed here.
insert into {{ schema }}.bidder_window_totals (experiment_id, segment, bidder_key, bidder_id, sums)
select
    experiment_id,
    segment,
    ((('x' || left(md5(bidder_id), 16))::bit(64)) >> 1)::bigint as bidder_key,
    bidder_id,
    sums
from incoming
where experiment_id = %(experiment_id)s
