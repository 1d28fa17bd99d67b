-- Schema version 10, step 2 of 4 for bidder_window_totals: each (experiment, segment, bidder)'s
-- version-9 rows (one per revenue label) become one row, the labels' totals in the byte order of
-- their names (the order results_v10_add_window_sum_labels records).
insert into {{ schema }}.bidder_window_totals_next (experiment_id, segment, bidder_key, bidder_id, sums)
select
    experiment_id,
    segment,
    ((('0x' || left(md5(bidder_id), 16))::ubigint) >> 1)::bigint as bidder_key,
    bidder_id,
    list(value order by arm) as sums
from {{ schema }}.bidder_window_totals
group by experiment_id, segment, bidder_id
