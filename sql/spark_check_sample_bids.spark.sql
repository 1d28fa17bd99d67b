-- Spark SQL. The bids the distribution checks read (the view `counterbid_check_day`): shard
-- :sample_shard of the day, cut with :auctions_every > 1 to the auctions whose cut key is 0 modulo
-- it (whole auctions; the rule of `sql/check_day_bids.sql`, which the driver applies again to the
-- same rows). The caller keeps only the columns the checks read before collecting.
select *
from counterbid_check_day
where check_shard = :sample_shard
    and (:auctions_every = 1 or pmod(cut_key, :auctions_every) = 0)
