-- Record that a migration step was applied.
insert into {{ schema }}.counterbid_schema (version, migrated_at)
values ($version, $migrated_at)
