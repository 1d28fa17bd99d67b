-- Earlier days of the staged experiment-to-date bids (drift history of the data checks).
create temp table staged_history as
select *
from read_parquet($path)
where ds < $ds
