"""Shards, bid-quantile summaries and the window's check outcomes against real DuckDB and Parquet."""

from __future__ import annotations

import datetime as dt

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.dataset as pads
import pyarrow.parquet as pq
import pytest

from counterbid.estimators import CheckResult
from counterbid.estimators import shard_of
from counterbid.operators.check_runner import write_check_results
from counterbid.operators.lake_hook import lake_glob
from counterbid.readers.shards import shard_folders, staged_bid_log_shards, write_shards
from counterbid.sql import load_sql

from .conftest import START

NOW = pd.Timestamp("2026-03-04 01:00", tz="UTC")


def _shard_members(folder) -> dict[int, list]:
    return {k: pads.dataset(str(p), format="parquet").to_table(columns=["auction_id"]).column(0).to_pylist()
            for k, p in shard_folders(folder)}


@pytest.mark.parametrize("ids", [
    np.arange(5_000, 7_000, dtype=np.int64),  # integer ids hash their decimal text
    np.array([f"q-{k:05d}-é" for k in range(2_000)], dtype=object),  # text ids (non-ASCII too) their UTF-8 bytes
])
def test_lake_shards_are_the_estimators_shard_of(tmp_path, ids):
    lake = tmp_path / "lake" / f"ds={START}"
    lake.mkdir(parents=True)
    frame = pd.DataFrame({"experiment_id": "tiles", "auction_id": np.repeat(ids, 2), "bid": 1.0})
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), lake / "tiles.parquet")
    con = duckdb.connect()
    params = {"lake_glob": lake_glob(tmp_path / "lake"), "ds": START, "experiment_id": "tiles"}
    want_rows = shard_of(frame["auction_id"], 5)
    assert con.execute(load_sql("lake_count_partition"), params).fetchall() == [(len(frame),)]
    reader = con.sql(load_sql("lake_read_partition_shards"), params=params | {"n_shards": 5}).to_arrow_reader(700)
    assert write_shards(reader, tmp_path / "day", 5) == [sum(want_rows == k) for k in range(5)]  # several batches
    members = _shard_members(tmp_path / "day")
    rows = pq.read_table(next((tmp_path / "day").glob("shard=0/*.parquet")))
    assert "shard" not in rows.column_names and rows.column_names[:2] == ["experiment_id", "auction_id"]
    assert sorted(members) == [0, 1, 2, 3, 4] and sum(len(v) for v in members.values()) == len(frame)
    want = dict(zip(ids.tolist(), shard_of(pd.Series(ids), 5).tolist()))
    for k, got in members.items():  # every auction whole, in the shard shard_of names
        assert {want[a] for a in got} == {k}
    # the same rule on the command line's copy of a bid log (sql/bid_log_read_shards.sql)
    with staged_bid_log_shards(lake / "tiles.parquet", 5) as shards:
        again = {k: sorted(pads.dataset(str(p), format="parquet").to_table(columns=["auction_id"]).column(0).to_pylist())
                 for k, p in shards}
    assert again == {k: sorted(v) for k, v in members.items()}


def test_an_empty_stream_writes_one_empty_shard_with_the_columns(tmp_path):
    con = duckdb.connect()
    reader = con.sql("select 1 as auction_id, 2.0 as bid, 0 as shard where false").to_arrow_reader(10)
    assert write_shards(reader, tmp_path / "day", 3) == [0, 0, 0]
    table = pq.read_table(tmp_path / "day" / "shard=0" / "part-0.parquet")
    assert table.num_rows == 0 and table.column_names == ["auction_id", "bid"]


def test_shard_read_reads_only_the_day(small_lake):
    con = duckdb.connect()
    day = START + dt.timedelta(days=1)
    params = {"lake_glob": lake_glob(small_lake / "bids"), "ds": day, "experiment_id": "tiles"}
    for name, extra in (("lake_count_partition", {}), ("lake_read_partition_shards", {"n_shards": 3})):
        plan = "\n".join(r[1] for r in con.execute("explain analyze " + load_sql(name), params | extra).fetchall())
        assert "Scanning Files: 2/10" in plan, name  # 5 days x 2 experiments: that day's 2 files only


def _summary(ds, n_bidders=4, n_bids=1000, shift=0.0):
    probs = np.arange(257) / 256
    return pd.DataFrame({"experiment_id": "tiles", "ds": ds, "n_bidders": n_bidders, "n_bids": n_bids,
                         "quantile_index": np.arange(257), "probability": probs, "bid": probs + shift,
                         "run_id": "r1", "computed_at": NOW})


def test_bid_quantiles_replace_and_trailing_window(hook):
    days = [START + dt.timedelta(days=k) for k in range(5)]
    for d in days:
        hook.replace_partition(experiment_id="tiles", ds=d, tables={"bid_quantiles": pa.Table.from_pandas(_summary(d))})
    again = _summary(days[1], shift=1.0)
    hook.replace_partition(experiment_id="tiles", ds=days[1], tables={"bid_quantiles": pa.Table.from_pandas(again)})
    got = hook.trailing_bid_quantiles(experiment_id="tiles", first_day=days[1], ds=days[4])
    assert sorted(set(pd.to_datetime(got["ds"]).dt.date)) == days[1:4]  # [first_day, ds)
    assert len(got) == 3 * 257
    assert got.loc[pd.to_datetime(got["ds"]).dt.date == days[1], "bid"].min() == 1.0  # the rerun replaced the day
    assert hook.trailing_bid_quantiles(experiment_id="banners", first_day=days[0], ds=days[4]) is None
    with pytest.raises(duckdb.ConstraintException):  # a stratum of one bidder is never summarised
        hook.replace_partition(experiment_id="tiles", ds=days[0],
                               tables={"bid_quantiles": pa.Table.from_pandas(_summary(days[0], n_bidders=1))})


def test_window_failures_are_the_days_whose_warmup_or_drift_failed(hook):
    days = [START + dt.timedelta(days=k) for k in range(4)]
    outcomes = {
        days[0]: [CheckResult("warmup", "warning", False, 0, 3), CheckResult("drift", "warning", True, 0.5, 1e-3)],
        days[1]: [CheckResult("warmup", "warning", False, 1, 3), CheckResult("drift", "warning", False, 1e-9, 1e-3)],
        days[2]: [CheckResult("sample_ratio", "error", False, 1e-6, 1e-3), CheckResult("warmup", "warning", True, 3, 3)],
        days[3]: [CheckResult("drift", "warning", False, 1e-9, 1e-3)],
    }
    assert hook.window_failures(experiment_id="tiles", ds=days[3], checks=["warmup", "drift"]) == {}  # no table yet
    with hook.connect() as con:
        for d, results in outcomes.items():
            write_check_results(con, results, experiment_id="tiles", ds=d, run_id="r1")
    got = hook.window_failures(experiment_id="tiles", ds=days[3], checks=["warmup", "drift"])
    assert got == {days[0]: ["warmup"], days[1]: ["drift", "warmup"]}  # days before ds only; other checks ignored
    assert hook.window_failures(experiment_id="banners", ds=days[3], checks=["warmup", "drift"]) == {}
