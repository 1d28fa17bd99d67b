-- The running window's description (the registered relation `incoming`, one row).
insert into {{ schema }}.bidder_window (
    experiment_id, ds, days_used, n_distinct_bidders, bid_exponent, run_id, computed_at
)
select
    experiment_id, ds, days_used, n_distinct_bidders, bid_exponent, run_id, computed_at
from incoming
where experiment_id = $experiment_id
