-- The realized per-arm average (realized revenue over each arm's own auctions) as a plain GROUP BY
-- (benchmark peer; biased: each arm's own auctions were bid against the mixture, not against that arm).
-- $path: a Parquet file or glob of bids; $weights: list of {arm, position, weight} structs.
with source as (
    select auction_id, arm, bid, position
    from read_parquet($path)
),

weights as (
    select w.arm, w.position, w.weight
    from (select unnest($weights) as w)
),

-- realized revenue of each auction: its bids times the click weight of the position each got
per_auction as (
    select
        source.arm,
        source.auction_id,
        sum(source.bid * coalesce(weights.weight, 0.0)) as revenue
    from source
    left join weights
        on source.arm = weights.arm
        and source.position = weights.position
    group by source.arm, source.auction_id
)

select
    arm,
    count(*) as n_auctions,
    avg(revenue) as revenue_per_auction,
    stddev_samp(revenue) / sqrt(count(*)) as std_error
from per_auction
group by arm
order by arm
