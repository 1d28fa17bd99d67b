-- The running window's description (the registered relation `incoming`: the pooled row, then one
-- row per segment).
insert into {{ schema }}.bidder_window (
    experiment_id, segment, ds, days_used, n_distinct_bidders, bid_exponent, sum_labels, run_id, computed_at
)
select
    experiment_id, segment, ds, days_used, n_distinct_bidders, bid_exponent, sum_labels, run_id, computed_at
from incoming
where experiment_id = $experiment_id
