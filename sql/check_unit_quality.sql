-- A bids relation without a `quality` column, seen with quality 1 on every row (auctions then rank
-- by bid): the contract aggregates and the statistical checks read `quality` whatever the log holds.
create or replace temp view {{ view }} as
select
    *,
    cast(1.0 as double) as quality
from {{ relation }}
