-- Whether one staged shard holds an auction with at least two bids: the first such shard is the hash
-- sample the distribution checks read (a shard of single-bidder auctions only has nothing to check).
select count(*) > 0 as has_auctions
from (
    select auction_id
    from read_parquet($path)
    group by auction_id
    having count(*) >= 2
    limit 1
) as estimable
