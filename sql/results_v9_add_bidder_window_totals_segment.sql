-- Schema version 9: a bidder's running totals are kept per segment too (null: pooled, every segment
-- together). No key on this table (see results_v6_create_bidder_window_totals); migration 8's index
-- on (experiment_id, bidder_id) still serves the day's semi-join, which then matches the segment.
alter table {{ schema }}.bidder_window_totals add column segment varchar
