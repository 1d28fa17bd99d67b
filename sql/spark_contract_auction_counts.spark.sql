-- Spark SQL. Auctions of the day (the view `counterbid_contract_bids`) per arm and number of
-- bidders (bids per auction; single-bidder auctions included, the checks leave them out): what the
-- sample-ratio and minimum-sample checks count, grouped on the executors so that the driver
-- receives one small row per (arm, number of bidders). The Spark text of `sql/check_auction_counts.sql`.
with auctions as (
    select
        min(cast(arm as string)) as arm,  -- one arm per auction (the contract checks it)
        count(*) as n_bidders
    from counterbid_contract_bids
    group by auction_id
)

select
    arm,
    n_bidders,
    count(*) as n_auctions
from auctions
group by arm, n_bidders
order by arm, n_bidders
