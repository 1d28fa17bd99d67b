-- First half of a day's update of the running totals: drop the rows of today's (segment, bidder)
-- pairs (those of the registered relation `incoming`; segment null: pooled), matched on the integer
-- bidder key, which the insert then writes again with today added.
delete from {{ schema }}.bidder_window_totals as t
where t.experiment_id = $experiment_id
    and exists (
        select 1 from incoming as i
        where ((('0x' || left(md5(i.bidder_id), 16))::ubigint) >> 1)::bigint = t.bidder_key
            and i.segment is not distinct from t.segment
    )
