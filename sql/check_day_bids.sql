-- The day's bids in the columns the statistical checks read.
select
    auction_id,
    bidder_id,
    arm,
    bid,
    position
from {{ relation }}
