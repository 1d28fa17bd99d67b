-- Spark SQL. Auctions and bids per arm of one experiment's day (the view `counterbid_gate_bids`):
-- the schema gate's row and arm checks. The Spark text of `sql/staged_arm_counts.sql`.
select
    cast(arm as string) as arm,
    count(distinct auction_id) as n_auctions,
    count(*) as n_bids
from counterbid_gate_bids
group by cast(arm as string)
order by arm nulls first
