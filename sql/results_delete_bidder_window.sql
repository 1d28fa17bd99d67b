-- Drop one experiment's running bidder window (bidder_window), pooled and every segment: before a rebuild, or when it no longer
-- matches the stored pieces.
delete from {{ schema }}.bidder_window
where experiment_id = $experiment_id
