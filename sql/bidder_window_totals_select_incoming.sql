-- The stored totals of today's bidders only: the (segment, bidder) pairs of the registered relation
-- `incoming` (today's totals; segment null: pooled), joined on both; bidders not seen before in
-- that segment have no rows.
select
    t.segment, t.bidder_id, t.arm, t.value
from {{ schema }}.bidder_window_totals as t
where t.experiment_id = $experiment_id
    and exists (
        select 1 from incoming as i
        where i.bidder_id = t.bidder_id and i.segment is not distinct from t.segment
    )
