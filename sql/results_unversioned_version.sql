-- Version of a results schema written before versions were recorded, from its columns:
-- 0 no arm_estimates table (nothing to migrate), 1 without the cluster column, 2 with it.
with source as (
    select column_name
    from information_schema.columns
    where table_schema = $schema
        and table_name = 'arm_estimates'
)

select
    case
        when count(*) = 0 then 0
        when count(*) filter (where column_name = 'cluster') = 0 then 1
        else 2
    end as version
from source
