-- Rows of the write, streamed in the column order of `incoming` (psycopg's COPY protocol).
copy incoming from stdin
