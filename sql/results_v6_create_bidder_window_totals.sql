-- U_b of every distinct bidder of the window, per revenue label (each arm, then `_mixture`).
-- No primary key: a day replaces the rows of its bidders (delete, then insert) in one transaction.
create table if not exists {{ schema }}.bidder_window_totals (
    experiment_id varchar not null,
    bidder_id varchar not null,
    arm varchar not null,
    value double not null
)
