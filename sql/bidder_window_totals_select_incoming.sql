-- The stored totals of today's bidders only: the bidders of the registered relation `incoming`
-- (today's totals), joined on their id; bidders not seen before have no rows.
select
    t.bidder_id, t.arm, t.value
from {{ schema }}.bidder_window_totals as t
where t.experiment_id = $experiment_id
    and t.bidder_id in (select i.bidder_id from incoming as i)
