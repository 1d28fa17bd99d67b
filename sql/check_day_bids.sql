-- The day's bids in the columns the statistical checks read: the contract's, then the log's
-- auction-level columns the experiment names ($auction_columns: its segment columns and scale
-- covariates, a list of names bound as a value; an empty list adds none). COLUMNS keeps those
-- columns' logged types (the checks' bid preparation validates them); experiment_id is always
-- among them, so the expression never matches an empty set. $auctions_every > 1 keeps the
-- auctions whose cut key is 0 modulo it: a smaller sample of whole auctions (1: every bid). The cut
-- key is hex digits 9-16 of md5 of the auction id as text, as an integer: independent of the shard
-- (digits 1-8) and computed alike by Spark (`sql/spark_check_day.spark.sql`).
select
    auction_id,
    bidder_id,
    arm,
    cast(bid as double) as bid,  -- any numeric type of the contract (decimals too)
    position,
    cast(quality as double) as quality,  -- 1 when the log has none (check_unit_quality.sql)
    columns(lambda c: c = 'experiment_id' or list_contains(cast($auction_columns as varchar[]), c))
from {{ relation }}
where $auctions_every = 1
    or coalesce(cast('0x' || substr(md5(cast(auction_id as varchar)), 9, 8) as ubigint), 0) % $auctions_every = 0
