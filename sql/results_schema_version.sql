-- Current version of the results schema (null: never versioned).
select max(version) as version
from {{ schema }}.counterbid_schema
