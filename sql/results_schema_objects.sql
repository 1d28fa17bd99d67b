-- Tables and views of the results schema, by name.
select
    table_name,
    table_type
from information_schema.tables
where table_schema = $schema
order by table_name
