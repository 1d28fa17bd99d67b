-- Spark SQL. Rows of the day (the view `counterbid_gate_bids`, with each row's file `bid_file` and
-- 0-based row in it `bid_row`) whose quality factor is missing or not a positive finite number, and
-- the first of them by file, then row, for the error message. The Spark text of
-- `sql/staged_quality_faults.sql`.
with faults as (
    select
        bid_file,
        bid_row,
        cast(auction_id as string) as auction_id,
        cast(quality as double) as quality
    from counterbid_gate_bids
    where quality is null
        or isnan(cast(quality as double))
        or cast(quality as double) in (double('inf'), double('-inf'))
        or cast(quality as double) <= 0
)

select
    count(*) as n_faults,
    min_by(bid_file, struct(bid_file, bid_row)) as first_file,
    min_by(bid_row, struct(bid_file, bid_row)) as first_row,
    min_by(auction_id, struct(bid_file, bid_row)) as first_auction,
    min_by(cast(quality as string), struct(bid_file, bid_row)) as first_quality
from faults
