"""Every check_*.sql and data_checks_*.sql statement against a real DuckDB database."""

from __future__ import annotations

import datetime as dt
import hashlib
import json

import duckdb
import pandas as pd
import pytest

from counterbid.sql import render_sql

# Three auctions written by hand: 1 clean, 2 with a rank violation and a duplicate bidder,
# 3 with a NaN bid, a bid under the floor and a null bidder.
BIDS = pd.DataFrame(
    {
        "experiment_id": ["e"] * 9,
        "auction_id": [1, 1, 1, 2, 2, 2, 3, 3, 3],
        "bidder_id": pd.array([10, 11, 12, 10, 10, 12, 10, None, 12], dtype="Int64"),
        "arm": ["a", "a", "a", "b", "b", "b", "a", "a", "a"],
        "bid": [0.9, 0.5, 0.2, 0.4, 0.8, 0.1, float("nan"), 0.03, 0.7],
        "position": pd.array([1, 2, None, 1, 2, None, 1, 2, None], dtype="Int32"),
    }
)


@pytest.fixture
def con():
    c = duckdb.connect()
    c.register("day_bids", BIDS)
    c.execute(render_sql("check_unit_quality", view="day_bids_q", relation="day_bids"))  # no quality column: 1
    yield c
    c.close()


def test_check_schema(con):
    out = con.execute(render_sql("check_schema", relation="day_bids")).df()
    types = dict(zip(out["column_name"], out["column_type"]))
    assert types == {"experiment_id": "VARCHAR", "auction_id": "BIGINT", "bidder_id": "BIGINT", "arm": "VARCHAR",
                     "bid": "DOUBLE", "position": "INTEGER"}


def test_check_auction_aggregates(con):
    out = con.execute(render_sql("check_auction_aggregates", relation="day_bids_q"),
                      {"floor": 0.05, "tie_tolerance": 1e-9}).df().set_index("auction_id")
    assert out["n_bids"].tolist() == [3, 3, 3]
    assert out["n_bidders"].tolist() == [3, 2, 2]  # auction 2 repeats a bidder; auction 3 has a null
    assert out["null_keys"].tolist() == [0, 0, 1]
    assert out["bad_bids"].tolist() == [0, 0, 2]  # NaN, and 0.03 < floor shown at position 2
    # auction 2: position 1 bid 0.4 is beaten by position 2 (0.8); auction 3: position 1 (NaN) never compares,
    # position 2 (0.03) is beaten by the unshown 0.7
    assert out["rank_violations"].tolist() == [0, 1, 1]
    assert out["n_arms"].tolist() == [1, 1, 1]
    assert out["arm_min"].tolist() == ["a", "b", "a"]
    loose = con.execute(render_sql("check_auction_aggregates", relation="day_bids_q"),
                        {"floor": 0.0, "tie_tolerance": 1.0}).df()
    assert loose["rank_violations"].sum() == 0 and loose["bad_bids"].tolist() == [0, 0, 1]


def test_check_auction_aggregates_floor_and_quality(con):
    # Auction 1 of 4 bids ranked by bid x quality: 0.5 x 2 = 1.0 > 0.9 x 1 = 0.9, so the 0.5 bid is on top.
    # The 0.04 bid is below the floor 0.05 and unshown (allowed); 0.2 x 0.2 = 0.04 is a sub-floor
    # effective bid shown at position 3 (refused); in auction 2 a quality of 0 and a null one are refused.
    bids = pd.DataFrame({"experiment_id": "e", "auction_id": [1, 1, 1, 1, 2, 2], "bidder_id": [1, 2, 3, 4, 1, 2],
                         "arm": "a", "bid": [0.9, 0.5, 0.2, 0.04, 0.6, 0.5],
                         "quality": [1.0, 2.0, 0.2, 1.0, 0.0, None],
                         "position": pd.array([2, 1, 3, None, 1, 2], dtype="Int32")})
    con.register("weighted", bids)
    out = con.execute(render_sql("check_auction_aggregates", relation="weighted"),
                      {"floor": 0.05, "tie_tolerance": 1e-9}).df().set_index("auction_id")
    assert out["bad_bids"].tolist() == [1, 2]
    assert out["rank_violations"].tolist()[0] == 0  # ranked by bid x quality, not by bid
    by_bid = con.execute(render_sql("check_auction_aggregates", relation="day_bids_q"), {"floor": 0.0, "tie_tolerance": 1e-9}).df()
    assert by_bid["rank_violations"].tolist() == [0, 1, 1]  # quality 1: ranked by bid as before


def test_check_day_bids(con):
    out = con.execute(render_sql("check_day_bids", relation="day_bids_q"), {"auction_columns": [], "auctions_every": 1}).df()
    assert list(out.columns) == ["auction_id", "bidder_id", "arm", "bid", "position", "quality", "experiment_id"]
    assert len(out) == 9 and out["quality"].tolist() == [1.0] * 9


def test_check_day_bids_adds_the_named_auction_columns_as_logged(con):
    # One statement for every spec: the auction-level columns the experiment names (segments, scale
    # covariates) come bound as a list, keep their logged types, and nothing else of the log is read.
    logged = BIDS.assign(aisle=["dry", "dry", "dry", "cold", "cold", "cold", "dry", "dry", "dry"],
                         footfall=pd.array([3, 3, 3, 8, 8, 8, 5, 5, 5], dtype="Int16"),
                         note=["x"] * 9, bid=BIDS["bid"].astype("float32"))
    con.register("logged", logged)
    con.execute(render_sql("check_unit_quality", view="logged_q", relation="logged"))
    sql = render_sql("check_day_bids", relation="logged_q")
    out = con.execute(sql, {"auction_columns": ["aisle", "footfall"], "auctions_every": 1}).df()
    assert list(out.columns) == ["auction_id", "bidder_id", "arm", "bid", "position", "quality", "experiment_id",
                                 "aisle", "footfall"]
    assert out["aisle"].tolist() == logged["aisle"].tolist() and str(out["footfall"].dtype) == "int16"
    assert str(out["bid"].dtype) == "float64"  # the contract's bid as double, whatever its logged type
    only = con.execute(sql, {"auction_columns": ["footfall"], "auctions_every": 1}).df()
    assert "aisle" not in only.columns and "note" not in only.columns and "footfall" in only.columns
    # a name the log lacks selects nothing: the checks' bid preparation then names the missing column
    assert "shelf" not in con.execute(sql, {"auction_columns": ["shelf"], "auctions_every": 1}).df().columns


def test_check_day_bids_keeps_one_auction_in_k_whole():
    # auctions_every k > 1: the auctions whose cut key is 0 modulo k, every bid of each, about 1 in k
    c = duckdb.connect()
    bids = pd.DataFrame({"experiment_id": "e", "auction_id": [f"lot-{a}" for a in range(3000) for _ in range(3)],
                         "bidder_id": list(range(3)) * 3000, "arm": "a", "bid": 1.0, "position": 1, "quality": 1.0})
    c.register("many", bids)
    sql = render_sql("check_day_bids", relation="many")
    whole = c.execute(sql, {"auction_columns": [], "auctions_every": 1}).df()
    assert len(whole) == len(bids)
    for k in (2, 3):
        part = c.execute(sql, {"auction_columns": [], "auctions_every": k}).df()
        sizes = part.groupby("auction_id").size()
        assert (sizes == 3).all()  # whole auctions only
        # the plain rule in Python: hex digits 9-16 of md5 of the id's text, as an integer, 0 modulo k
        kept = {a for a in bids["auction_id"].unique() if int(hashlib.md5(a.encode()).hexdigest()[8:16], 16) % k == 0}
        assert set(sizes.index) == kept
        assert abs(len(sizes) / 3000 - 1 / k) < 4 * (1 / k * (1 - 1 / k) / 3000) ** 0.5  # binomial: about 1 in k


def test_check_trailing_bids_window(con):
    days = [dt.date(2026, 3, d) for d in (1, 2, 3, 4)]
    hist = pd.concat([BIDS.assign(ds=d) for d in days] + [BIDS.assign(ds=days[-1], experiment_id="x")])
    con.register("hist", hist.assign(quality=1.0))
    out = con.execute(render_sql("check_trailing_bids", relation="hist"),
                      {"experiment_id": "e", "first_day": dt.date(2026, 3, 2), "ds": dt.date(2026, 3, 4)}).df()
    assert sorted(pd.to_datetime(out["ds"]).dt.date.unique()) == [dt.date(2026, 3, 2), dt.date(2026, 3, 3)]
    assert len(out) == 18


def test_data_checks_create_insert_delete_select(tmp_path):
    c = duckdb.connect(str(tmp_path / "results.duckdb"))
    c.execute(render_sql("results_create_schema", schema="cb"))
    c.execute(render_sql("results_v1_create_data_checks", schema="cb"))
    c.execute(render_sql("results_v1_create_data_checks", schema="cb"))  # idempotent
    row = {"experiment_id": "e", "ds": dt.date(2026, 3, 2), "check": "drift", "severity": "warning", "passed": False,
           "observed": 1e-6, "threshold": 1e-3, "details": json.dumps({"by_bidders": {"5": {"pvalue": 1e-6}}}),
           "run_id": "manual__1", "checked_at": dt.datetime(2026, 3, 3, 6, tzinfo=dt.timezone.utc)}
    c.execute(render_sql("data_checks_insert", schema="cb"), row)
    c.execute(render_sql("data_checks_insert", schema="cb"), {**row, "check": "shading", "passed": True})
    c.execute(render_sql("data_checks_insert", schema="cb"), {**row, "ds": dt.date(2026, 3, 3)})
    with pytest.raises(duckdb.ConstraintException):  # one row per (experiment, ds, check)
        c.execute(render_sql("data_checks_insert", schema="cb"), row)
    out = c.execute(render_sql("data_checks_select", schema="cb"), {"experiment_id": "e", "ds": dt.date(2026, 3, 2)}).df()
    assert out["check"].tolist() == ["drift", "shading"]  # failures first
    assert json.loads(out["details"].iloc[0])["by_bidders"]["5"]["pvalue"] == 1e-6
    c.execute(render_sql("data_checks_delete", schema="cb"), {"experiment_id": "e", "ds": dt.date(2026, 3, 2)})
    assert c.execute("select count(*) from cb.data_checks").fetchone()[0] == 1
    c.close()
