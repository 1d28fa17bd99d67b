-- Spark SQL. The distinct files the bids (the view `counterbid_bids`) were read from; the caller
-- ranks them by path.
select distinct bid_file
from counterbid_bids
