-- Schema version 9, step 1 of 5 for bidder_window_gram: the same table with a `segment` column
-- (null: the pooled window's form), built beside the version-6 table, filled by
-- results_v9_copy_bidder_window_gram, swapped in, keyed by results_v9_index_bidder_window_gram.
-- sum over the window's (segment's) distinct bidders of U_b U_b', every (arm, arm) pair of the
-- revenue labels, the mixture included.
create table {{ schema }}.bidder_window_gram_next (
    experiment_id varchar not null,
    segment varchar,
    arm_i varchar not null,
    arm_j varchar not null,
    value double precision not null
)
