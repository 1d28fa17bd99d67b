-- The benchmark's floor: the bid column of a Parquet bid log, nothing else.
select bid
from read_parquet($path)
