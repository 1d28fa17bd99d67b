"""The example DAG's mapped shard tasks: a shard with no bid at the floor, and a shard that fails.

A day of two experiments, each split into 3 shards (``max_bids_per_shard`` 3000, 8000 bids). In
experiment ``kites`` (floor 0.3) every bid of the auctions of shard 1 is put below the floor and
unshown: the day passes its checks (the contract and the counting checks hold, and some bid of the
day reaches the floor), and shard 1 holds no bid the floor lets through. That is chance (an md5
split), so shard 1 contributes its auctions and bidders at revenue 0 (docs/method.md, "A stratum
with no bid at the floor"): the day is written, and its rows are the combination of the three
shards' pieces, each estimated from its own auctions here (1e-12).

When a shard task fails (a bid above the spec's ``max_bid``, which the validate step does not
check and the estimator refuses), the failure names the shard, the other shard tasks finish, and no
experiment of the day is written (the estimate steps wait for every shard task of the day: a shard
failed after its retries holds the day back, and the run fails with one failure, the shard's).
Real ``dag.test`` runs through ``counterbid backfill``'s ``run_days``.
"""

from __future__ import annotations

import datetime as dt

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest

from counterbid.cli.backfill import run_days
from counterbid.dags_example.lake import write_bid_lake
from counterbid.estimators import combine_pieces, load_experiments, shard_of, stratum_pieces
from counterbid.operators.pipeline import DEFAULT_CLUSTER

DAY = dt.date(2026, 6, 1)
SPEC_TEXT = """
experiments:
  - id: kites
    control_arm: low
    start: 2026-06-01
    floor: 0.3
    arms:
      - {name: low,  share: 0.5, position_weights: [0.4, 0.2]}
      - {name: high, share: 0.5, position_weights: [0.4, 0.3]}
  - id: reeds
    control_arm: one
    start: 2026-06-01
    arms:
      - {name: one, share: 0.5, position_weights: [0.3, 0.1]}
      - {name: two, share: 0.5, position_weights: [0.3, 0.2]}
"""


@pytest.fixture
def lake(tmp_path, airflow_db):
    spec = tmp_path / "spec.yaml"
    spec.write_text(SPEC_TEXT)
    write_bid_lake(tmp_path / "bids", load_experiments(spec).values(), start=DAY, days=1, auctions_per_day=2000,
                   n_bidders=4, seed=63)
    path = tmp_path / "bids" / f"ds={DAY}" / "kites.parquet"
    table = pq.read_table(path)
    sunk = shard_of(table.column("auction_id").to_pandas(), 3) == 1
    bids = np.where(sunk, 0.1, table.column("bid").to_numpy())
    unshown = pa.scalar(None, type=table.schema.field("position").type)
    position = pc.if_else(pa.array(sunk), unshown, table.column("position"))
    table = table.set_column(table.schema.get_field_index("bid"), "bid", pa.array(bids))
    table = table.set_column(table.schema.get_field_index("position"), "position", position)
    pq.write_table(table, path)
    conf = {"lake_root": str(tmp_path / "bids"), "spec_path": str(spec), "results_database": str(tmp_path / "r.duckdb"),
            "staging_root": str(tmp_path / "staging"), "clicks_root": "", "max_bids_per_shard": "3000"}
    return conf, int(sunk.sum())


def _rows(path, table, experiment_id):
    with duckdb.connect(str(path), read_only=True) as con:
        return con.execute(f"select * from {table} where experiment_id = ? and ds = ? order by arm, metric",
                           [experiment_id, DAY]).df()


def _assert_rows_equal(got, want):
    merged = want.merge(got, on=["arm", "metric"], how="outer", suffixes=("", "_db"), indicator=True)
    assert (merged["_merge"] == "both").all() and len(got) == len(want)
    for col in ["estimate", "std_error", "ci_low", "ci_high", "n_auctions", "n_bids"]:
        # stored bidder sums meet by id text in a portable order: the last bits may differ
        pd.testing.assert_series_equal(merged[col], merged[f"{col}_db"], check_names=False, check_exact=False,
                                       rtol=1e-12, atol=0.0, check_dtype=False)


def test_a_shard_with_no_bid_at_the_floor_counts_at_zero_and_the_day_is_written(lake, tmp_path):
    conf, sunk = lake
    assert sunk > 1000  # about a third of the bids
    (run,) = run_days([DAY], conf=conf)
    assert run.state == "success", (run.line(), run.reasons)
    mapped = sorted(m for task, m, state, _ in run.tasks if task == "estimate_shard" and state == "success")
    assert mapped == [0, 1, 2, 3, 4, 5]  # kites is listed first: its shard 1 is map index 1
    exp = load_experiments(conf["spec_path"])["kites"]
    frame = pq.read_table(f"{conf['lake_root']}/ds={DAY}/kites.parquet").to_pandas()
    frame = frame[frame["experiment_id"] == "kites"].reset_index(drop=True)
    shard = shard_of(frame["auction_id"], 3)
    pieces = [p for k in range(3) for p in stratum_pieces(frame[shard == k].reset_index(drop=True), exp, shard=k,
                                                          day=DAY, cluster=DEFAULT_CLUSTER)]
    assert {p.shard for p in pieces if p.below_floor} == {1} and any(not p.below_floor for p in pieces)
    want = combine_pieces(pieces, exp, cluster=DEFAULT_CLUSTER).table
    daily = _rows(conf["results_database"], "arm_estimates", "kites")
    _assert_rows_equal(daily, want)
    revenue = daily[daily["metric"] == "revenue_per_auction"]
    assert set(revenue["n_auctions"]) == {frame["auction_id"].nunique()}  # shard 1's auctions count
    assert np.isfinite(revenue["std_error"]).all() and (revenue["estimate"] > 0).all()
    with duckdb.connect(conf["results_database"], read_only=True) as con:
        stored = con.execute("select shard, min(floor_quantile), max(floor_quantile) from stratum_pieces "
                             "where experiment_id = 'kites' group by shard order by shard").fetchall()
    assert [(k, lo == 1.0, hi == 1.0) for k, lo, hi in stored] == [(0, False, False), (1, True, True),
                                                                   (2, False, False)]


def test_a_failed_shard_names_itself_and_holds_the_day_back(lake, tmp_path):
    conf, _ = lake
    reeds = pq.read_table(f"{conf['lake_root']}/ds={DAY}/reeds.parquet").to_pandas()
    top = reeds["bid"].nlargest(2).to_numpy()
    failing = int(shard_of(reeds.loc[[reeds["bid"].idxmax()], "auction_id"], 3)[0])
    spec = tmp_path / "capped.yaml"  # reeds accepts bids up to just below its largest one
    spec.write_text(SPEC_TEXT.replace("  - id: reeds\n", f"  - id: reeds\n    max_bid: {float(top[0] + top[1]) / 2!r}\n"))
    assert load_experiments(spec)["reeds"].max_bid < top[0]
    (run,) = run_days([DAY], conf={**conf, "spec_path": str(spec)})
    states = {(task, m): state for task, m, state, _ in run.tasks}
    assert run.state == "failed", run.line()
    index = 3 + failing  # reeds is listed second
    assert sorted(m for (task, m), s in states.items() if task == "estimate_shard" and s == "success") == \
        sorted(set(range(6)) - {index})
    assert states[("estimate_shard", index)] == "failed"
    assert len(run.reasons) == 1 and run.reasons[0].startswith("estimate_shard"), run.reasons
    assert f"(shard {failing}): column 'bid' row" in run.reasons[0] and "above max_bid" in run.reasons[0]
    assert {s for (task, _), s in states.items() if task in ("experiment.estimate", "experiment.write")} == {"upstream_failed"}
    with duckdb.connect(conf["results_database"], read_only=True) as con:  # the checks' outcomes only
        tables = {name for (name,) in con.execute("select table_name from information_schema.tables").fetchall()}
        assert "data_checks" in tables
        for table in ("arm_estimates", "arm_estimates_to_date", "stratum_pieces"):
            assert table not in tables or con.execute(f"select count(*) from {table}").fetchone() == (0,), table
