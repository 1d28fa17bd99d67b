-- Schema version 9, step 2 of 5 for bidder_window: copy every version-8 row; all were pooled windows (segment null).
insert into {{ schema }}.bidder_window_next (
    experiment_id, ds, days_used, n_distinct_bidders, bid_exponent, run_id, computed_at
)
select
    experiment_id, ds, days_used, n_distinct_bidders, bid_exponent, run_id, computed_at
from {{ schema }}.bidder_window
