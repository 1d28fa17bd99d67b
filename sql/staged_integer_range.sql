-- Rows of a staged bids file whose integer column lies outside $low..$high (int64), and the
-- first such value: 128-bit integer ids are accepted only when every value fits in int64.
select
    count(*) filter (where {{ column }} < $low or {{ column }} > $high) as outside,
    cast(min({{ column }}) filter (where {{ column }} < $low or {{ column }} > $high) as varchar) as example
from read_parquet($path)
