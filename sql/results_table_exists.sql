-- Whether a table or view exists (the report shows data-check status only when it does).
select count(*) > 0 as present
from information_schema.tables
where table_schema = $schema
    and table_name = $table
