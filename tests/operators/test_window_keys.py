"""The running window's integer key, computed once per id, and today's buckets as ranges of it.

What the tests can catch: a key that differs from the one either sink stores (the daily update's
buckets would no longer be ranges of the stored key, and nothing would be skipped), a bucket that
is not the key's top bits, a day's rows set aside by another rule, and a lookup that still scans
every stored row group for one bucket of today's bidders when the window was written in bucket order.
"""

from __future__ import annotations

import hashlib
import re

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.feather as feather
import pytest

from counterbid.estimators.errors import InputError
from counterbid.operators.hooks import ResultsHook
from counterbid.operators.results_schema import WINDOW_TABLES, DuckDBSession
from counterbid.operators.window_buckets import PieceRows, bucket_today
from counterbid.operators.window_keys import KEY_BITS, key_buckets, window_keys

IDS = ["stall-1", "stall-2", "awning-ß-7", "", "x" * 300, "7", "stall-10", "stall-01"]


def _plain_key(text: str) -> int:
    """The documented key written out: the first 16 hex digits of the md5 of the UTF-8 text, shifted right once."""
    return int(hashlib.md5(text.encode("utf-8")).hexdigest()[:16], 16) >> 1


def _stored(ids: pa.Array, sums: np.ndarray | None = None, segment: str | None = None) -> pa.Table:
    n = len(ids)
    sums = np.ones((n, 2)) if sums is None else sums
    return pa.table({"experiment_id": pa.array(["stalls"] * n, pa.string()), "segment": pa.array([segment] * n, pa.string()),
                     "bidder_key": pa.nulls(n, pa.int64()), "bidder_id": ids,
                     "sums": pa.ListArray.from_arrays(pa.array(np.arange(0, 2 * n + 1, 2), pa.int32()),
                                                      pa.array(sums.ravel()))})


def test_the_key_is_the_md5_rule_and_the_one_either_sink_stores(sink):
    keys = window_keys(pa.chunked_array([IDS[:3], IDS[3:]]))
    assert keys.dtype == np.int64 and keys.tolist() == [_plain_key(t) for t in IDS]
    sink.ensure_tables()
    with sink.session() as s, s.transaction(), s.incoming(WINDOW_TABLES[-1], _stored(pa.array(IDS))):
        s.execute("results_insert_bidder_window_totals", {"experiment_id": "stalls"})
    with sink.connect(read_only=True) as con:
        rows = con.execute("select bidder_id, bidder_key from main.bidder_window_totals").fetchall()
    assert dict(rows) == dict(zip(IDS, keys.tolist()))


def test_a_null_id_has_no_key_and_no_ids_no_keys():
    with pytest.raises(InputError, match="null"):
        window_keys(pa.array(["stall-1", None]))
    assert window_keys(pa.array([], pa.string())).shape == (0,)


def test_a_bucket_is_the_top_bits_of_the_key():
    keys = window_keys(pa.array([f"stall-{i}" for i in range(4000)]))
    for bits in (0, 1, 3, 10):
        want = [k // 2 ** (KEY_BITS - bits) for k in keys.tolist()]
        assert key_buckets(keys, bits).tolist() == want
    assert np.bincount(key_buckets(keys, 3)).min() > 400  # md5 spreads the ids over the ranges
    for bad in (-1, KEY_BITS + 1, 2.0, True):
        with pytest.raises(InputError, match="bucket bits"):
            key_buckets(keys, bad)


def test_todays_rows_are_set_aside_by_the_top_bits_of_their_key(tmp_path):
    ids = pa.array([f"stall-{i}" for i in range(500)])
    piece = PieceRows(None, 10, 0, ids, np.arange(1000, dtype=float).reshape(500, 2))
    rows = bucket_today([[piece]], tmp_path / "today", exponent=0, bits=2)
    expected = {b: sorted(t for t in ids.to_pylist() if _plain_key(t) >> (KEY_BITS - 2) == b) for b in range(4)}
    got = {int(folder.name.split("-")[1]): sorted(pa.concat_tables(
        [feather.read_table(f) for f in folder.glob("group-*.arrow")]).column("bidder_id").to_pylist())
        for folder in rows.buckets()}
    assert got == expected


def test_one_buckets_lookup_skips_the_row_groups_of_other_buckets_keys(tmp_path):
    """A window of 600k stored bidders inserted in bucket order (4 key ranges, about five row groups
    of DuckDB's 122,880 rows): the lookup of a few thousand of today's bidders of one bucket reads
    the row groups of that key range only, and finds exactly the stored ones among them."""
    hook = ResultsHook(database=tmp_path / "results.duckdb")
    hook.ensure_tables()
    ids = pc.binary_join_element_wise("stall-", pc.cast(pa.array(np.arange(600_000)), pa.string()), "")
    bucket = key_buckets(window_keys(ids), 2)
    ordered = ids.take(pa.array(np.argsort(bucket, kind="stable")))
    with hook.session() as s, s.transaction(), s.incoming(WINDOW_TABLES[-1], _stored(ordered)):
        s.execute("results_insert_bidder_window_totals", {"experiment_id": "stalls"})
    mine = ids.filter(pa.array(bucket == 1))
    new = pa.array([t for t in (f"stall-new-{i}" for i in range(20_000)) if _plain_key(t) >> (KEY_BITS - 2) == 1])
    today = _stored(pa.concat_arrays([mine.slice(0, 3000), new]))
    with duckdb.connect(str(tmp_path / "results.duckdb"), read_only=True) as con:
        s = DuckDBSession(con, schema="main", sql=hook.sql, where="results.duckdb")
        with s.incoming(WINDOW_TABLES[-1], today):
            found = s.fetch_arrow("bidder_window_totals_select_incoming", {"experiment_id": "stalls"})
            plan = con.execute("explain analyze " + s.sql("bidder_window_totals_select_incoming"),
                               {"experiment_id": "stalls"}).fetchall()[0][1]
    assert sorted(found.column("bidder_id").to_pylist()) == sorted(mine.slice(0, 3000).to_pylist())
    scanned = [tuple(map(int, m)) for m in re.findall(r"Row Groups Scanned: (\d+) / (\d+)", plan)]
    stored_scan = max(scanned, key=lambda m: m[1])  # the stored window's scan (today's relation is not a table)
    assert stored_scan[1] >= 4 and stored_scan[0] <= stored_scan[1] // 2, plan
