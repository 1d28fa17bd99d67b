-- Columns of a results table in their stored order.
select column_name
from information_schema.columns
where table_schema = $schema
    and table_name = $table
order by ordinal_position
