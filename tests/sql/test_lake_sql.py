"""Lake reads against real Parquet files: partition pruning, range reads, staged-file queries."""

from __future__ import annotations

import datetime as dt
import re

import duckdb
import pandas as pd
import pyarrow.dataset as pads
import pyarrow.parquet as pq
import pytest

from counterbid.estimators.errors import InputError
from counterbid.operators.lake_hook import lake_glob
from counterbid.sql import load_sql

from .conftest import START


def _plan(sql: str, params: dict) -> str:
    con = duckdb.connect()
    return "\n".join(row[1] for row in con.execute("explain analyze " + sql, params).fetchall())


def _scanned(plan: str) -> tuple[int, int]:
    m = re.search(r"Scanning Files: (\d+)/(\d+)", plan)
    assert m, plan
    return int(m.group(1)), int(m.group(2))


def _lake_frame(root, exp_id):
    table = pads.dataset(str(root), format="parquet", partitioning="hive").to_table()
    df = table.to_pandas()
    df["ds"] = pd.to_datetime(df["ds"]).dt.date
    return df[df["experiment_id"] == exp_id]


def test_partition_read_prunes_to_one_day(small_lake, lake):
    day = START + dt.timedelta(days=2)
    params = {"lake_glob": lake_glob(small_lake / "bids"), "ds": day, "experiment_id": "tiles"}
    # 5 days x 2 experiments = 10 files; only that day's 2 files are opened
    assert _scanned(_plan(load_sql("lake_read_partition"), params)) == (2, 10)
    got = lake.read_lake_partition(small_lake / "bids", experiment_id="tiles", ds=day).to_pandas()
    want = _lake_frame(small_lake / "bids", "tiles")
    want = want[want["ds"] == day]
    assert len(got) == len(want) > 0
    assert set(got["ds"]) == {day} and set(got["experiment_id"]) == {"tiles"}
    assert got["bid"].tolist() == want["bid"].tolist()  # same rows, same order


def test_range_read_prunes_to_the_range(small_lake, lake):
    first, last = START + dt.timedelta(days=1), START + dt.timedelta(days=3)
    params = {"lake_glob": lake_glob(small_lake / "bids"), "first_ds": first, "ds": last, "experiment_id": "banners"}
    assert _scanned(_plan(load_sql("lake_read_range"), params)) == (6, 10)
    got = lake.read_lake_range(small_lake / "bids", experiment_id="banners", first_ds=first, ds=last).to_pandas()
    assert sorted(set(got["ds"])) == [first + dt.timedelta(days=k) for k in range(3)]
    want = _lake_frame(small_lake / "bids", "banners")
    assert len(got) == int(want["ds"].between(first, last).sum())


def test_missing_lake_is_one_clear_error(tmp_path, lake):
    with pytest.raises(InputError, match="no Parquet files"):
        lake.read_lake_partition(tmp_path / "nowhere", experiment_id="tiles", ds=START)


def test_staged_columns_and_arm_counts(small_lake, lake, tmp_path):
    table = lake.read_lake_partition(small_lake / "bids", experiment_id="tiles", ds=START)
    path = tmp_path / "day.parquet"
    pq.write_table(table, path)
    frame = table.to_pandas()
    cols = lake.staged_columns(path)
    assert cols["bid"] == "DOUBLE" and cols["arm"] == "VARCHAR" and cols["position"] == "INTEGER"
    assert cols["ds"] == "DATE"
    counts = lake.staged_arm_counts(path).set_index("arm")
    want = frame.groupby("arm").agg(n_auctions=("auction_id", "nunique"), n_bids=("bid", "size"))
    assert counts["n_auctions"].to_dict() == want["n_auctions"].to_dict()
    assert counts["n_bids"].to_dict() == want["n_bids"].to_dict()


def test_measured_position_weights_pool_the_window(small_lake, lake):
    first, last = START + dt.timedelta(days=1), START + dt.timedelta(days=4)
    got = lake.clicks_position_weights(small_lake / "clicks", experiment_id="tiles", first_ds=first, ds=last)
    clicks = pads.dataset(str(small_lake / "clicks"), format="parquet", partitioning="hive").to_table().to_pandas()
    clicks["ds"] = pd.to_datetime(clicks["ds"]).dt.date
    sel = clicks[(clicks["experiment_id"] == "tiles") & clicks["ds"].between(first, last)]
    want = sel.groupby(["arm", "position"])[["impressions", "clicks"]].sum().reset_index()
    merged = got.merge(want, on=["arm", "position"], suffixes=("", "_pd"))
    assert len(merged) == len(want) == len(got)
    assert (merged["impressions"] == merged["impressions_pd"]).all()
    assert (merged["clicks"] == merged["clicks_pd"]).all()
    pd.testing.assert_series_equal(merged["weight"], merged["clicks_pd"] / merged["impressions_pd"], check_names=False)
