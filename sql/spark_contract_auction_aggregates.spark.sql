-- Spark SQL. One row per auction of the day's bids (the view `counterbid_contract_bids`, with a
-- `quality` column): the aggregates the contract's per-auction suite validates, computed on the
-- executors so that only the suite's outcome reaches the driver. The Spark text of
-- `sql/check_auction_aggregates.sql` (same columns, same rules); no `order by`, the suite needs none.
-- :floor: the experiment's floor on effective bids (0 without one): a bid below it must be unshown;
-- :tie_tolerance: effective bids closer than this count as tied when checking that a higher one
-- never gets a worse position. Auctions rank by the effective bid, bid x quality.
with source as (
    select
        experiment_id,
        auction_id,
        bidder_id,
        arm,
        cast(bid as double) as bid,
        cast(quality as double) as quality,
        cast(bid as double) * cast(quality as double) as effective_bid,
        position
    from counterbid_contract_bids
),

ranked as (
    -- Highest effective bid placed at any worse position of the same auction (unshown bids rank last).
    select
        *,
        max(effective_bid) over (
            partition by auction_id
            order by position asc nulls last
            rows between 1 following and unbounded following
        ) as best_bid_below
    from source
)

select
    auction_id,
    min(experiment_id) as experiment_id,
    -- smallest and largest arm name: both must be arms of the spec
    min(arm) as arm_min,
    max(arm) as arm_max,
    -- distinct values as the size of their set (nulls left out, as `count(distinct ...)` does): two
    -- distinct counts in one aggregate would make Spark expand every row once per counted column
    cast(size(collect_set(arm)) as bigint) as n_arms,
    count(*) as n_bids,
    cast(size(collect_set(bidder_id)) as bigint) as n_bidders,
    count(*) filter (where experiment_id is null or bidder_id is null or arm is null) as null_keys,
    -- invalid bid or quality, or a sub-floor effective bid that was shown
    count(*) filter (
        where bid is null or isnan(bid) or abs(bid) = double('infinity') or bid < 0
            or quality is null or isnan(quality) or abs(quality) = double('infinity') or quality <= 0
            or (effective_bid < :floor and position is not null)
    ) as bad_bids,
    -- a shown bid beaten (by more than the tie tolerance) by an effective bid at a worse position
    count(*) filter (
        where position is not null and best_bid_below > effective_bid + :tie_tolerance
    ) as rank_violations
from ranked
group by auction_id
