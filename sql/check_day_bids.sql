-- The day's bids in the columns the statistical checks read.
select
    auction_id,
    bidder_id,
    arm,
    cast(bid as double) as bid,  -- any numeric type of the contract (decimals too)
    position,
    cast(quality as double) as quality  -- 1 when the log has none (check_unit_quality.sql)
from {{ relation }}
