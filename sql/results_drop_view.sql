-- Views are dropped before a migration changes the tables under them, and created again after it.
drop view if exists {{ schema }}.{{ view }}
