-- The stored running bidder window of one experiment (no row: none kept).
select
    experiment_id, ds, days_used, n_distinct_bidders, bid_exponent
from {{ schema }}.bidder_window
where experiment_id = $experiment_id
