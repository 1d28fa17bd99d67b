-- The day's bids in the columns the statistical checks read: the contract's, then the log's
-- auction-level columns the experiment names ($auction_columns: its segment columns and scale
-- covariates, a list of names bound as a value; an empty list adds none). COLUMNS keeps those
-- columns' logged types (the checks' bid preparation validates them); experiment_id is always
-- among them, so the expression never matches an empty set. $auctions_every > 1 keeps the
-- auctions whose id hashes to 0 modulo it: a smaller sample of whole auctions (1: every bid).
select
    auction_id,
    bidder_id,
    arm,
    cast(bid as double) as bid,  -- any numeric type of the contract (decimals too)
    position,
    cast(quality as double) as quality,  -- 1 when the log has none (check_unit_quality.sql)
    columns(lambda c: c = 'experiment_id' or list_contains(cast($auction_columns as varchar[]), c))
from {{ relation }}
where $auctions_every = 1 or hash(auction_id) % $auctions_every = 0
