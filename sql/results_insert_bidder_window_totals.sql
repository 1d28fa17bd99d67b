-- Running totals of the bidders in the registered relation `incoming` (today's, or every bidder
-- of the window when it is rebuilt).
insert into {{ schema }}.bidder_window_totals (experiment_id, bidder_id, arm, value)
select experiment_id, bidder_id, arm, value
from incoming
where experiment_id = $experiment_id
