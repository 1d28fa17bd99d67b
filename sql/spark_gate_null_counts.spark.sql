-- Spark SQL. Nulls in the columns of the bids data contract that must always be set (the view
-- `counterbid_gate_bids`). The Spark text of `sql/staged_null_counts.sql`.
select
    count_if(experiment_id is null) as experiment_id,
    count_if(auction_id is null) as auction_id,
    count_if(bidder_id is null) as bidder_id,
    count_if(arm is null) as arm,
    count_if(bid is null) as bid
from counterbid_gate_bids
