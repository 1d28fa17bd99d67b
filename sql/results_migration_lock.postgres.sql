-- Serialize migrations of one results schema between writers (released at commit or rollback).
select pg_advisory_xact_lock(hashtextextended('counterbid_schema.' || %(schema)s, 0))
