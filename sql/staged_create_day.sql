-- The staged day's bids as a temporary table (input of the full data-check runner).
create temp table staged_day as
select *
from read_parquet($path)
