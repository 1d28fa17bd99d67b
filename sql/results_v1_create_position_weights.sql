-- Position weights each day's estimates used: from the spec, or measured from the click log.
create table if not exists {{ schema }}.arm_position_weights (
    experiment_id varchar not null,
    ds date not null,
    arm varchar not null,
    position integer not null,
    weight double not null,
    source varchar not null check (source in ('spec', 'measured')),
    impressions bigint,
    clicks bigint,
    first_click_ds date,
    run_id varchar not null,
    computed_at timestamptz not null,
    primary key (experiment_id, ds, arm, position)
)
