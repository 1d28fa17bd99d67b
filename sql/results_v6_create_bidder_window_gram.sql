-- sum over the window's distinct bidders of U_b U_b' (U_b: a bidder's influence sums weighted by
-- their strata's auctions), every (arm, arm) pair of the revenue labels, the mixture included.
create table if not exists {{ schema }}.bidder_window_gram (
    experiment_id varchar not null,
    arm_i varchar not null,
    arm_j varchar not null,
    value double not null,
    primary key (experiment_id, arm_i, arm_j)
)
