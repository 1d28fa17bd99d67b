-- One shard of the staged day as a temporary table: the hash sample of whole auctions the
-- distribution checks and the day's bid-quantile summary read when the day has several shards.
create temp table staged_sample as
select *
from read_parquet($path)
