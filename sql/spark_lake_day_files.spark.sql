-- Spark SQL. The fingerprint of one lake day's input files (the view `counterbid_day_files`: every
-- row of the day's Parquet files with Spark's file metadata and the experiment id): one row per file
-- with its size in bytes, its rows and the rows of experiment :experiment_id. The Spark load step
-- records these rows; the estimate step finds the same ones before it reads the day, and the shard
-- count follows from the experiment's rows. Only one row per file reaches the driver.
select
    bid_file,
    min(file_size) as file_size,
    count(*) as file_rows,
    count_if(experiment_id = :experiment_id) as experiment_rows
from counterbid_day_files
group by bid_file
order by bid_file
