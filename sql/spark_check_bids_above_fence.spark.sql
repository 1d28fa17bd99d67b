-- Spark SQL. Bids of the whole day (the view `counterbid_check_day`) above their stratum's outlier
-- fence (docs/method.md, "Outlying bids"): the fences come from the checks' sample as the view
-- `counterbid_outlier_fences` (n_bidders, fence). The Spark text of `sql/check_bids_above_fence.sql`.
with source as (
    select
        auction_id,
        bidder_id,
        cast(bid as double) as bid,
        cast(bid as double) * cast(quality as double) as effective_bid,
        count(*) over (partition by auction_id) as n_bidders
    from counterbid_check_day
)

select /*+ BROADCAST(fences) */
    source.n_bidders,
    source.auction_id,
    source.bidder_id,
    source.bid,
    source.effective_bid
from source
inner join counterbid_outlier_fences as fences
    on source.n_bidders = fences.n_bidders
where source.effective_bid > fences.fence
order by source.n_bidders, source.effective_bid desc
limit :max_flagged
