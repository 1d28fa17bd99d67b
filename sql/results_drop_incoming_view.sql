-- After the insert: the temporary view over a staged Parquet file that served as `incoming` (DuckDB).
drop view incoming
