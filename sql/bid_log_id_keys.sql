-- A 64-bit key (DuckDB's `hash` of the text) of each id in `candidate_ids` (one column `id`,
-- registered by the caller), in the order given: equal keys flag ids that may be equal, distinct
-- keys prove the ids distinct.
select hash(id) as id_key
from candidate_ids
