-- Nulls in the columns of the bids data contract that must always be set.
select
    count(*) filter (where experiment_id is null) as experiment_id,
    count(*) filter (where auction_id is null) as auction_id,
    count(*) filter (where bidder_id is null) as bidder_id,
    count(*) filter (where arm is null) as arm,
    count(*) filter (where bid is null) as bid
from read_parquet($path)
