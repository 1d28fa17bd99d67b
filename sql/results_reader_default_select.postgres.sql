-- Tables and views the writer creates later (a migration rebuilds tables and recreates views)
-- are readable by the reader too.
alter default privileges in schema {{ schema }} grant select on tables to {{ role }}
