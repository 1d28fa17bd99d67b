-- The shard of each distinct auction id of a bid log held in memory, in the order the ids are given
-- (`distinct_ids`, one column `id`, registered by the caller): the same rule as
-- bid_log_read_shards.sql and the estimators' `shard_of` (first 8 hex digits of md5 of the id as
-- text, as an integer, modulo $n_shards), computed once per distinct id rather than once per bid.
select coalesce(cast('0x' || left(md5(cast(id as varchar)), 8) as ubigint) % $n_shards, 0) as shard
from distinct_ids
