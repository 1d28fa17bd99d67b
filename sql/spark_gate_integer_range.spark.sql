-- Spark SQL. Rows of the day whose integer column (the view `counterbid_gate_values`, the column as
-- `gate_value`) lies outside :low..:high (int64), and the smallest such value: wide integer ids
-- (a Parquet uint64 reads as decimal(20,0)) are accepted only when every value fits in int64. The
-- Spark text of `sql/staged_integer_range.sql`.
with source as (
    select cast(gate_value as decimal(38, 0)) as value
    from counterbid_gate_values
)

select
    count_if(value < cast(:low as decimal(38, 0)) or value > cast(:high as decimal(38, 0))) as outside,
    cast(min(case when value < cast(:low as decimal(38, 0)) or value > cast(:high as decimal(38, 0))
        then value end) as string) as example
from source
