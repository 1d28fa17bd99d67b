-- Version of a results schema written before versions were recorded, from its columns:
-- 0 no arm_estimates table (nothing to migrate), 1 without the cluster column, 2 with it,
-- 3 when the to-date rows also carry the anytime-valid bounds, 4 when the to-date table's first_ds
-- is nullable as well (warm-up rows without a first day used), 5 when estimates carry what_if,
-- 6 when the running bidder window table exists, 7 when estimates carry segment (8 adds only a
-- PostgreSQL index, not told apart), 9 when the running bidder window carries segment too, 10 when it
-- records the order of its totals' labels (one row per bidder).
with source as (
    select table_name, column_name, is_nullable
    from information_schema.columns
    where table_schema = $schema
        and table_name in ('arm_estimates', 'arm_estimates_to_date', 'bidder_window')
)

select
    case
        when count(*) filter (where table_name = 'arm_estimates') = 0 then 0
        when count(*) filter (where table_name = 'arm_estimates' and column_name = 'cluster') = 0 then 1
        when count(*) filter (where table_name = 'arm_estimates_to_date' and column_name = 'anytime_low') = 0 then 2
        when count(*) filter (
            where table_name = 'arm_estimates_to_date' and column_name = 'first_ds' and is_nullable = 'YES'
        ) = 0 then 3
        when count(*) filter (where table_name = 'arm_estimates' and column_name = 'what_if') = 0 then 4
        when count(*) filter (where table_name = 'bidder_window') = 0 then 5
        when count(*) filter (where table_name = 'arm_estimates' and column_name = 'segment') = 0 then 6
        when count(*) filter (where table_name = 'bidder_window' and column_name = 'segment') = 0 then 7
        when count(*) filter (where table_name = 'bidder_window' and column_name = 'sum_labels') = 0 then 9
        else 10
    end as version
from source
