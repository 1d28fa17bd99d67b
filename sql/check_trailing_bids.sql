-- One experiment's bids of the trailing days [$first_day, $ds) from a history relation, for the
-- drift check.
select
    ds,
    auction_id,
    bidder_id,
    arm,
    cast(bid as double) as bid,  -- any numeric type of the contract (decimals too)
    position,
    cast(quality as double) as quality  -- 1 when the log has none (check_unit_quality.sql)
from {{ relation }}
where experiment_id = $experiment_id
    and cast(ds as date) >= $first_day
    and cast(ds as date) < $ds
