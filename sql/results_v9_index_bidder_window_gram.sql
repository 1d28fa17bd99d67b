-- Schema version 9, step 5 of 5 for bidder_window_gram: its key (experiment_id, segment, arm_i, arm_j),
-- the null segment (pooled) one key value.
create unique index bidder_window_gram_key on {{ schema }}.bidder_window_gram (
    experiment_id, (segment is null), coalesce(segment, ''), arm_i, arm_j
)
