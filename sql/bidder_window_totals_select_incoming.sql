-- The stored totals of today's bidders only: the (segment, bidder) pairs of the registered relation
-- `incoming` (today's totals; segment null: pooled) matched on the segment and the integer bidder key
-- (the stored table's id text is not read); bidders not seen before in that segment have no row.
-- `sums` is in the order of the window's sum_labels; two rows of one (segment, bidder_key): ids collided.
with today as (
    select
        segment,
        bidder_id,
        ((('0x' || left(md5(bidder_id), 16))::ubigint) >> 1)::bigint as bidder_key
    from incoming
)

select
    d.segment, d.bidder_id, d.bidder_key, t.sums
from {{ schema }}.bidder_window_totals as t
inner join today as d
    on t.bidder_key = d.bidder_key and t.segment is not distinct from d.segment
where t.experiment_id = $experiment_id
