-- Auctions and bids per arm in a staged bids file.
with source as (
    select
        cast(arm as varchar) as arm,
        auction_id
    from read_parquet($path)
)

select
    arm,
    count(distinct auction_id) as n_auctions,
    count(*) as n_bids
from source
group by arm
order by arm nulls first
