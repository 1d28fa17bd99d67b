-- Running totals of the (segment, bidder) pairs in the registered relation `incoming` (today's, or
-- every pair of the window when it is rebuilt; segment null: pooled).
insert into {{ schema }}.bidder_window_totals (experiment_id, segment, bidder_id, arm, value)
select experiment_id, segment, bidder_id, arm, value
from incoming
where experiment_id = $experiment_id
