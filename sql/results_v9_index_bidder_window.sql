-- Schema version 9, step 5 of 5 for bidder_window: its key (experiment_id, segment). A unique index
-- on expressions: the pooled window (segment null) is one key value, a segment labelled '' another.
create unique index bidder_window_key on {{ schema }}.bidder_window (
    experiment_id, (segment is null), coalesce(segment, '')
)
