-- Schema version 10, step 4 of 4 for bidder_window_totals (PostgreSQL): a day's read of its own
-- bidders' totals (bidder_window_totals_select_incoming) and its delete of them
-- (results_delete_bidder_window_totals_incoming) probe this index by the integer key instead of
-- scanning every stored bidder of the experiment (migration 8's index went with the version-9 table).
create index if not exists bidder_window_totals_by_key
on {{ schema }}.bidder_window_totals (experiment_id, bidder_key)
