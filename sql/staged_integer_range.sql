-- Rows of a staged bids file whose integer column lies outside $low..$high (int64), and the
-- smallest such value: 128-bit integer ids are accepted only when every value fits in int64.
-- The bounds are compared as HUGEINT so that the comparison holds for every integer type.
with source as (
    select cast({{ column }} as hugeint) as value
    from read_parquet($path)
)

select
    count(*) filter (where value < cast($low as hugeint) or value > cast($high as hugeint)) as outside,
    cast(min(value) filter (where value < cast($low as hugeint) or value > cast($high as hugeint)) as varchar)
        as example
from source
