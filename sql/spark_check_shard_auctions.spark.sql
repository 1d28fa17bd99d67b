-- Spark SQL. The shards of the day (the view `counterbid_check_day`) holding an auction with at
-- least two bids, ascending: the first of them (shard 0 when it is one) is the hash sample the
-- distribution checks read, as `sql/staged_shard_has_auctions.sql` picks it on the local route.
select distinct check_shard as shard
from (
    select
        check_shard,
        auction_id
    from counterbid_check_day
    group by check_shard, auction_id
    having count(*) >= 2
) as estimable
order by shard
