"""Staged per-bidder rows reach both sinks from their Parquet file in bounded batches.

A day's bidder sums (text ids, some bidders in a segment) are written once from a whole Arrow table
and once, over the same partition, from the staged Parquet file with the batch size forced to 37
rows, so the rows travel in at least 28 batches (DuckDB reads the file with its own Parquet reader; PostgreSQL
receives one COPY fed batch by batch). The stored rows must be the same. A file whose last batch breaks a
NOT NULL column must leave the stored rows as they were: the batches are one transaction.
What it can catch: a batch dropped, repeated or cut short, a whole-table path the staged file does
not fit (the old write read ``num_rows`` and every column of a table), a half-written day.
"""

from __future__ import annotations

import datetime as dt
import math

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from counterbid.operators import results_schema
from counterbid.operators.results_schema import row_batches, row_count, staged_rows

DAY = dt.date(2026, 7, 14)
WHEN = pd.Timestamp("2026-07-15 02:00", tz="UTC")
N_ROWS, SMALL_BATCH = 1000, 37


def _bidder_sums(*, broken_at: int | None = None) -> pa.Table:
    rng = np.random.default_rng(19)
    values = rng.normal(size=N_ROWS).tolist()
    if broken_at is not None:
        values[broken_at] = None
    return pa.table({
        "experiment_id": ["kites"] * N_ROWS, "ds": pa.array([DAY] * N_ROWS, pa.date32()),
        "n_bidders": pa.array(np.where(np.arange(N_ROWS) % 3 == 0, 3, 4), pa.int32()),
        "shard": pa.array(np.arange(N_ROWS) % 4, pa.int32()),
        "bidder_id": [f"perch-{k // 2:04d}" for k in range(N_ROWS)],
        "arm": ["calm" if k % 2 else "brisk" for k in range(N_ROWS)],
        "value": pa.array(values, pa.float64()),
        "run_id": ["w1"] * N_ROWS, "computed_at": pa.array([WHEN] * N_ROWS, pa.timestamp("us", tz="UTC")),
        "segment": [None if k % 5 else "dusk" for k in range(N_ROWS)]})


def _stored(hook) -> pd.DataFrame:
    rows = hook.fetch_df("stratum_piece_bidder_sums_select", {"experiment_id": "kites", "days": [DAY]})
    return rows.reset_index(drop=True)


def _staged(table: pa.Table, path) -> object:
    pq.write_table(table, path, row_group_size=128)
    return staged_rows(path)


def test_batches_cover_the_rows_once_and_stay_bounded(tmp_path, monkeypatch):
    table = _bidder_sums()
    staged = _staged(table, tmp_path / "sums.parquet")
    monkeypatch.setattr(results_schema, "WRITE_BATCH_ROWS", SMALL_BATCH)
    batches = list(row_batches(staged))
    assert len(batches) >= math.ceil(N_ROWS / SMALL_BATCH)  # row groups of 128 cut at 37 rows
    assert max(b.num_rows for b in batches) == SMALL_BATCH and row_count(staged) == N_ROWS
    assert pa.Table.from_batches(batches).equals(table)


def test_a_staged_file_in_small_batches_stores_what_one_insert_stores(sink, tmp_path, monkeypatch):
    table = _bidder_sums()
    assert sink.replace_partition(experiment_id="kites", ds=DAY,
                                  tables={"stratum_piece_bidder_sums": table}) == {"stratum_piece_bidder_sums": N_ROWS}
    one_shot = _stored(sink)
    assert len(one_shot) == N_ROWS
    monkeypatch.setattr(results_schema, "WRITE_BATCH_ROWS", SMALL_BATCH)
    staged = _staged(table, tmp_path / "sums.parquet")
    assert sink.replace_partition(experiment_id="kites", ds=DAY,
                                  tables={"stratum_piece_bidder_sums": staged}) == {"stratum_piece_bidder_sums": N_ROWS}
    pd.testing.assert_frame_equal(_stored(sink), one_shot)
    assert not sink.table_exists("incoming")  # the staged file's view went with the write


def test_a_bad_row_in_the_last_batch_leaves_the_day_as_it_was(sink, tmp_path, monkeypatch):
    sink.replace_partition(experiment_id="kites", ds=DAY, tables={"stratum_piece_bidder_sums": _bidder_sums()})
    before = _stored(sink)
    monkeypatch.setattr(results_schema, "WRITE_BATCH_ROWS", SMALL_BATCH)
    staged = _staged(_bidder_sums(broken_at=N_ROWS - 2), tmp_path / "broken.parquet")
    with pytest.raises(Exception, match="(?i)null"):  # duckdb.ConstraintException / psycopg NotNullViolation
        sink.replace_partition(experiment_id="kites", ds=DAY, tables={"stratum_piece_bidder_sums": staged})
    pd.testing.assert_frame_equal(_stored(sink), before)


def _many_bidder_sums(n_rows: int) -> pa.Table:
    """``n_rows`` bidder-sum rows with distinct text ids and random sums (several MiB in DuckDB)."""
    rng = np.random.default_rng(23)
    ids = pa.array([f"wren-{k:07d}-{rng.integers(1 << 30):09d}" for k in range(n_rows // 2)] * 2)
    return pa.table({
        "experiment_id": pa.array(["kites"] * n_rows), "ds": pa.array([DAY] * n_rows, pa.date32()),
        "n_bidders": pa.array(np.full(n_rows, 4), pa.int32()), "shard": pa.array(np.arange(n_rows) % 4, pa.int32()),
        "bidder_id": ids, "arm": pa.array(["calm"] * (n_rows // 2) + ["brisk"] * (n_rows // 2)),
        "value": pa.array(rng.normal(size=n_rows), pa.float64()),
        "run_id": pa.array(["w2"] * n_rows), "computed_at": pa.array([WHEN] * n_rows, pa.timestamp("us", tz="UTC")),
        "segment": pa.nulls(n_rows, pa.string())})


def test_the_write_runs_under_its_own_duckdb_limit_and_stores_what_a_roomy_write_stores(tmp_path, monkeypatch):
    """The write transaction opens the results file with the write limit (not the readers' limit); a
    staged file larger than that limit once in DuckDB (600k rows of distinct text ids) is stored
    whole, row for row what a write under a roomy limit stores. What it can catch: the write opened
    with the readers' limit (the 30M-bid day's write step peaked at 1.55 GiB), or a small limit
    that fails or drops rows."""
    from counterbid.operators.hooks import ResultsHook
    from counterbid.operators.results_schema import DuckDBSession

    limits: dict[str, str] = {}
    plain_execute = DuckDBSession.execute

    def watched(self, name, params=None, **identifiers):
        if name.startswith("results_insert_") or name == "stratum_piece_bidder_sums_select":
            limits[name] = self.con.execute("select current_setting('memory_limit')").fetchone()[0]
        return plain_execute(self, name, params, **identifiers)

    monkeypatch.setattr(DuckDBSession, "execute", watched)
    pq.write_table(_many_bidder_sums(600_000), tmp_path / "sums.parquet", row_group_size=100_000)
    staged = staged_rows(tmp_path / "sums.parquet")
    roomy = ResultsHook(database=tmp_path / "roomy.duckdb", lock_timeout=5, write_memory_limit_mib=1024)
    roomy.replace_partition(experiment_id="kites", ds=DAY, tables={"stratum_piece_bidder_sums": staged})
    assert limits.pop("results_insert_stratum_piece_bidder_sums").startswith("1.0 GiB")
    tight = ResultsHook(database=tmp_path / "tight.duckdb", lock_timeout=5, memory_limit_mib=1024,
                        write_memory_limit_mib=24)
    tight.replace_partition(experiment_id="kites", ds=DAY, tables={"stratum_piece_bidder_sums": staged})
    assert limits.pop("results_insert_stratum_piece_bidder_sums").startswith("24.0 MiB")
    got = _stored(tight)
    assert limits["stratum_piece_bidder_sums_select"].startswith("1.0 GiB")  # readers keep theirs
    assert len(got) == 600_000
    pd.testing.assert_frame_equal(got, _stored(roomy))


def test_the_write_limit_follows_the_memory_budget(monkeypatch):
    from counterbid.estimators.errors import InputError
    from counterbid.operators.hooks import RESULTS_WRITE_FLOOR_MIB, ResultsHook, results_write_memory_mib

    monkeypatch.setenv("COUNTERBID_MEMORY_BUDGET_MIB", "1200")
    assert results_write_memory_mib() == RESULTS_WRITE_FLOOR_MIB == 768
    monkeypatch.setenv("COUNTERBID_MEMORY_BUDGET_MIB", "4000")
    assert results_write_memory_mib() == 2000
    assert ResultsHook(database="x.duckdb", memory_limit_mib=300).write_memory_limit_mib == 300  # a caller's limit: every connection
    assert ResultsHook(database="x.duckdb").write_memory_limit_mib == 2000
    with pytest.raises(InputError, match="write_memory_limit_mib"):
        ResultsHook(database="x.duckdb", write_memory_limit_mib=0)
