-- The day's bids in the columns the statistical checks read.
select
    auction_id,
    bidder_id,
    arm,
    cast(bid as double) as bid,  -- any numeric type of the contract (decimals too)
    position
from {{ relation }}
