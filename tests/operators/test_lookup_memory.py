"""The memory cap of the running window's lookup on a DuckDB results file.

The cap is set by today's rows (the lookup's hash table and what it finds), not by the stored
window, on the ground that the scanned blocks of the stored window can be dropped without being
written anywhere. What the tests can catch: a cap below what a bucket-sized lookup needs (DuckDB,
given no temporary directory, fails instead of spilling: on a read-only mount that spill would
have nowhere to go), a capped lookup finding other rows than an uncapped one, a cap above the
results connection's own limit or without its floor.
"""

from __future__ import annotations

import math

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pytest

from counterbid.estimators.errors import InputError
from counterbid.operators.hooks import ResultsHook
from counterbid.operators.lookup_memory import (
    LOOKUP_BYTES_PER_ROW, LOOKUP_FLOOR_MIB, LOOKUP_HEADROOM, lookup_memory_mib,
)
from counterbid.operators.results_schema import WINDOW_TABLES, DuckDBSession
from counterbid.operators.window_buckets import WINDOW_BUCKET_ROWS

LABELS = 4  # revenue labels of a three-arm experiment's window: each arm and the mixture


def test_the_cap_follows_todays_rows_between_the_floor_and_the_connections_limit():
    for n_rows, id_bytes, limit in ((0, 0, 4096), (10, 200, 4096), (1_000_000, 17_000_000, 4096),
                                    (3_000_000, 90_000_000, 4096), (3_000_000, 90_000_000, 300), (5, 5, 16)):
        plain = math.ceil(LOOKUP_HEADROOM * (n_rows * LOOKUP_BYTES_PER_ROW + id_bytes) / 2**20)
        assert lookup_memory_mib(n_rows, id_bytes, limit_mib=limit) == min(limit, max(LOOKUP_FLOOR_MIB, plain))
    assert lookup_memory_mib(5, 5, limit_mib=16) == 16  # never above the connection's own limit
    assert lookup_memory_mib(2_000_000, 0, limit_mib=10**6) > lookup_memory_mib(1_000_000, 0, limit_mib=10**6)


@pytest.mark.parametrize("bad", [dict(n_rows=-1), dict(id_bytes=2.5), dict(limit_mib=0), dict(n_rows=True)])
def test_a_bad_argument_is_one_line_naming_it(bad):
    args = dict(n_rows=10, id_bytes=10, limit_mib=100) | bad
    with pytest.raises(InputError, match=f"`{next(iter(bad))}`") as err:
        lookup_memory_mib(args.pop("n_rows"), args.pop("id_bytes"), **args)
    assert "\n" not in str(err.value)


def _rows(ids: pa.Array, sums: np.ndarray | None) -> pa.Table:
    """Rows of ``bidder_window_totals``' shape (pooled window): stored totals, or today's lookup rows (no sums)."""
    n = len(ids)
    values = pa.nulls(n, pa.list_(pa.float64())) if sums is None else \
        pa.ListArray.from_arrays(pa.array(np.arange(0, n * LABELS + 1, LABELS), pa.int32()), pa.array(sums.ravel()))
    return pa.table({"experiment_id": pa.array(["stalls"] * n, pa.string()), "segment": pa.nulls(n, pa.string()),
                     "bidder_key": pa.nulls(n, pa.int64()), "bidder_id": ids, "sums": values})


def _ids(prefix: str, start: int, n: int) -> pa.Array:
    return pc.binary_join_element_wise(prefix, pc.cast(pa.array(np.arange(start, start + n)), pa.string()), "")


@pytest.mark.slow
def test_a_bucket_sized_lookup_runs_under_its_cap_with_nowhere_to_spill_and_finds_the_same_rows(tmp_path):
    """A full bucket of today's rows (``WINDOW_BUCKET_ROWS``), nine in ten of them stored, against
    a window of 2.5M stored bidders plus another experiment's: the lookup under the cap, on a
    connection with no temporary directory, returns the rows the uncapped lookup returns. With
    nearly every row found the result the lookup holds is near its largest for a bucket."""
    rng = np.random.default_rng(20)
    hook = ResultsHook(database=tmp_path / "results.duckdb")
    hook.ensure_tables()
    stored = _ids("stall-", 0, 2_500_000)
    with hook.session() as s:
        for chunk in range(0, len(stored), 500_000):
            part = stored.slice(chunk, 500_000)
            with s.transaction(), s.incoming(WINDOW_TABLES[-1], _rows(part, rng.random((len(part), LABELS)))):
                s.execute("results_insert_bidder_window_totals", {"experiment_id": "stalls"})
    seen = pc.take(stored, pa.array(rng.choice(len(stored), 9 * WINDOW_BUCKET_ROWS // 10, replace=False)))
    today = _rows(pa.concat_arrays([seen, _ids("stall-new-", 0, WINDOW_BUCKET_ROWS - len(seen))]), None)
    cap = lookup_memory_mib(today.num_rows, today.column("bidder_id").nbytes, limit_mib=hook.memory_limit_mib)
    assert cap < hook.memory_limit_mib  # the cap binds

    def found(config: dict) -> pa.Table:
        with duckdb.connect(str(tmp_path / "results.duckdb"), read_only=True, config=config) as con:
            s = DuckDBSession(con, schema="main", sql=hook.sql, where="results.duckdb")
            with s.incoming(WINDOW_TABLES[-1], today):
                rows = s.fetch_arrow("bidder_window_totals_select_incoming", {"experiment_id": "stalls"})
            assert con.execute("select count(*) from duckdb_temporary_files()").fetchall() == [(0,)]
        return rows.sort_by("bidder_id")

    capped = found({"memory_limit": f"{cap}MiB", "threads": 2, "temp_directory": ""})
    assert capped.num_rows == len(seen)
    assert capped.equals(found({"memory_limit": f"{hook.memory_limit_mib}MiB", "threads": 2}))
    # and the hook's own lookup (its connection capped the same way) finds them too
    assert hook.bidder_window_totals(experiment_id="stalls", today=today).sort_by("bidder_id").equals(capped)
