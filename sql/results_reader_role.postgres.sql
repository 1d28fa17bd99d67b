-- The role a dashboard reads the results with: whether it exists, and whether it is a superuser
-- (a superuser can write whatever it is granted, so it cannot be the read-only role).
select rolsuper as is_superuser
from pg_catalog.pg_roles
where rolname = %(role)s
