-- Column names and DuckDB types of a staged bids file (reads the Parquet footer only).
select
    column_name,
    column_type
from (describe select * from read_parquet($path))
