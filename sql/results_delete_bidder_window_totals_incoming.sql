-- First half of a day's update of the running totals: drop the rows of today's (segment, bidder)
-- pairs (those of the registered relation `incoming`; segment null: pooled), which the insert then
-- writes again with today added.
delete from {{ schema }}.bidder_window_totals as t
where t.experiment_id = $experiment_id
    and exists (
        select 1 from incoming as i
        where i.bidder_id = t.bidder_id and i.segment is not distinct from t.segment
    )
