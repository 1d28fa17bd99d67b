-- The reader may look up names in the results schema (and create nothing there: no CREATE).
grant usage on schema {{ schema }} to {{ role }}
