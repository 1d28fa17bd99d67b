-- Spark SQL. For a hash repartition into :n_shards partitions, the smallest bigint key that Spark's
-- hash partitioning sends to each partition (the partition of a row is `pmod(hash(key), n)`,
-- Murmur3 with Spark's seed, the same expression as `repartition(n, key)` on a bigint column),
-- searched among the keys 0 .. :candidates - 1. Keying each shard's rows by the key of the
-- partition numbered like the shard puts every shard in a partition of its own.
select
    pmod(hash(id), :n_shards) as shard,
    min(id) as partition_key
from range(0, :candidates)
group by pmod(hash(id), :n_shards)
