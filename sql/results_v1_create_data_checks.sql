-- Outcome of every data check per (experiment, day); rewritten as a whole on each run.
create table if not exists {{ schema }}.data_checks (
    experiment_id varchar not null,
    ds date not null,
    "check" varchar not null,
    severity varchar not null,
    passed boolean not null,
    observed double,
    threshold double,
    details json,
    run_id varchar,
    checked_at timestamp with time zone not null,
    primary key (experiment_id, ds, "check")
)
