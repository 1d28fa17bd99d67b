-- An empty session-private copy of a results table's columns, filled by COPY before the insert
-- statement reads it as `incoming` (DuckDB registers the Arrow table under that name instead).
create temporary table incoming on commit drop as
select *
from {{ schema }}.{{ table }}
with no data
