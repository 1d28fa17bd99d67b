-- Auctions of the day per arm and number of bidders (bids per auction; single-bidder auctions
-- included, the checks leave them out): what the sample-ratio and minimum-sample checks count,
-- aggregated here over the whole day so that those checks stay exact without loading its bids.
with auctions as (
    select
        min(cast(arm as varchar)) as arm,  -- one arm per auction (the contract checks it)
        count(*) as n_bidders
    from {{ relation }}
    group by auction_id
)

select
    arm,
    n_bidders,
    count(*) as n_auctions
from auctions
group by arm, n_bidders
order by arm, n_bidders
