-- The next destination of the same transaction stages its own rows.
drop table incoming
