-- One experiment's bids of the trailing days [$first_day, $ds) from a history relation, for the
-- drift check.
select
    ds,
    auction_id,
    bidder_id,
    arm,
    cast(bid as double) as bid,  -- any numeric type of the contract (decimals too)
    position
from {{ relation }}
where experiment_id = $experiment_id
    and cast(ds as date) >= $first_day
    and cast(ds as date) < $ds
