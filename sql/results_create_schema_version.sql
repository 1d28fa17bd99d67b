-- The results schema's version: one row per applied migration step (the highest is current).
create table if not exists {{ schema }}.counterbid_schema (
    version integer not null primary key,
    migrated_at timestamptz not null
)
