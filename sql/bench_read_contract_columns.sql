-- The benchmark's input floor: every column of a Parquet bid log that the estimator reads.
select auction_id, bidder_id, arm, bid, position
from read_parquet($path)
