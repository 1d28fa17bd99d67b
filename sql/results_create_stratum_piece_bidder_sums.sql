-- Per stratum piece clustered by bidder, each bidder's revenue influence sum per arm (and the
-- mixture): added across strata, shards and days before squaring. Empty for pieces clustered by
-- auction. No primary key: one day can hold millions of rows, and the replace of an (experiment,
-- day) deletes them all before inserting the pieces, which never repeat a (bidder, arm).
create table if not exists {{ schema }}.stratum_piece_bidder_sums (
    experiment_id varchar not null,
    ds date not null,
    n_bidders integer not null,
    shard integer not null,
    bidder_id varchar not null,
    arm varchar not null,
    value double not null,
    run_id varchar not null,
    computed_at timestamptz not null
)
