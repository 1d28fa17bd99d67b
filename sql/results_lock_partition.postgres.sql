-- Writers of one (experiment, day) take turns: the second waits here until the first commits,
-- then its delete sees (and removes) the first one's rows instead of colliding with them on the
-- primary key. A transaction-level advisory lock, released at commit or rollback; `what` keeps
-- the estimates and the data checks of a day apart.
select pg_advisory_xact_lock(
    hashtextextended(%(schema)s || '/' || %(what)s || '/' || %(experiment_id)s || '/' || cast(%(ds)s as date), 0)
)
