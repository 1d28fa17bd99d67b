-- Bids of the whole day above their stratum's outlier fence (docs/method.md, "Outlying bids"): the
-- fences come from the checks' sample (one shard) as the registered relation {{ fences }}
-- (n_bidders, fence); the whole day is scanned so that an outlying bid in any shard is found.
with source as (
    select
        auction_id,
        bidder_id,
        cast(bid as double) as bid,
        cast(bid as double) * cast(quality as double) as effective_bid,  -- quality 1 when the log has none
        count(*) over (partition by auction_id) as n_bidders
    from {{ relation }}
)

select
    source.n_bidders,
    source.auction_id,
    source.bidder_id,
    source.bid,
    source.effective_bid
from source
inner join {{ fences }} as fences
    on source.n_bidders = fences.n_bidders
where source.effective_bid > fences.fence
order by source.n_bidders, source.effective_bid desc
limit $max_flagged
