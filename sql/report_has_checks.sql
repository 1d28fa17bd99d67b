-- Whether any data-check outcome is stored (the report shows the check column only then).
select count(*) > 0 as present
from {{ schema }}.data_checks
