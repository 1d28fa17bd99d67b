-- The running bidder totals by (experiment, bidder): a day's read of its own bidders' totals
-- (bidder_window_totals_select_incoming) and its delete of them before the insert
-- (results_delete_bidder_window_totals_incoming) probe this index instead of scanning every stored
-- bidder of the experiment.
create index if not exists bidder_window_totals_by_bidder
on {{ schema }}.bidder_window_totals (experiment_id, bidder_id)
