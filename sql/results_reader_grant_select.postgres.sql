-- Every table and view of the results schema as it is now, for reading only.
grant select on all tables in schema {{ schema }} to {{ role }}
