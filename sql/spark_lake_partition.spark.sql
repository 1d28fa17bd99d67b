-- Spark SQL. One experiment's bids of one day from the Hive-partitioned bid lake (the view
-- `counterbid_lake`, whose rows carry the file they came from and their row in it: the read order
-- of the local engine's load step). The caller reads only the day's folder (Spark's `basePath`
-- above it makes `ds` a column); the filter on `ds` keeps the day exact.
select *
from counterbid_lake
where ds = :ds and experiment_id = :experiment_id
