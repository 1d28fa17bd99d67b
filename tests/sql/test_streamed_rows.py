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
