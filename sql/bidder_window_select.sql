-- The stored running bidder window of one experiment: the pooled row (segment null) first, then one
-- row per segment of a segmented experiment (no row: none kept). sum_labels: the order of the
-- revenue labels in the totals' `sums`.
select
    experiment_id, segment, ds, days_used, n_distinct_bidders, bid_exponent, sum_labels
from {{ schema }}.bidder_window
where experiment_id = $experiment_id
order by segment nulls first
