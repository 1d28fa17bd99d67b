"""``counterbid backfill`` of an experiment with segments, on both sinks: per-segment and pooled rows.

The backfill runs the daily DAG in-process (``dag.test()``) for each day. Checked against the
estimators run on the lake's bids directly: each day's rows are ``estimate_arms`` of that day's
bids, and the last day's experiment-to-date rows are one ``combine_pieces`` over every day's
pieces (the full recombination; docs/method.md, "Segments"), both to 1e-12. A rerun of the range
leaves every table as it was (the replace of an (experiment, day) is idempotent).
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import psycopg
import pytest
import scipy.stats as st

from counterbid.cli import main
from counterbid.estimators import (
    SimulatedSegment, combine_pieces, estimate_arms, load_experiments, simulate_segmented_experiment, stratum_pieces,
)

START = dt.date(2026, 6, 1)
DAYS = 3
SPEC = """
experiments:
  - id: shelves
    control_arm: low
    start: 2026-06-01
    segments: [counter]
    checks: {warmup: {days: 0}}
    arms:
      - {name: low,  share: 0.65, position_weights: [0.38, 0.16, 0.05]}
      - {name: tall, share: 0.35, position_weights: [0.33, 0.21, 0.09]}
"""
#: Two invented counters whose values differ in scale and shape and whose auctions differ in size.
COUNTERS = {
    "hatch": SimulatedSegment(st.gamma(3.0, scale=0.4), 4, 0.6),
    "wicket": SimulatedSegment(st.lognorm(0.6, scale=1.5), {3: 0.5, 5: 0.5}, 0.4),
}
KEY = ["ds", "arm", "segment", "metric"]
NUMBERS = ["estimate", "std_error", "ci_low", "ci_high"]


@pytest.fixture
def lake(tmp_path):
    spec = tmp_path / "spec.yaml"
    spec.write_text(SPEC)
    exp = load_experiments(spec)["shelves"]
    days = {}
    for d in range(DAYS):
        day = START + dt.timedelta(days=d)
        frame = simulate_segmented_experiment(COUNTERS, exp, n_auctions=1500, rng=40 + d, column="counter", ds=day,
                                              first_auction_id=d * 10_000, bidder_pool=500)
        folder = tmp_path / "bids" / f"ds={day}"
        folder.mkdir(parents=True)
        frame.drop(columns=["ds"]).to_parquet(folder / "shelves.parquet", index=False)
        days[day] = frame.drop(columns=["ds"])
    args = ["--lake", str(tmp_path / "bids"), "--experiments", str(spec), "--start", str(START),
            "--end", str(START + dt.timedelta(days=DAYS - 1)), "--quiet"]
    return args, exp, days


def _read(results: str, table: str) -> pd.DataFrame:
    query = f"select * from main.{table} where experiment_id = 'shelves'"
    if results.startswith("postgresql://"):
        with psycopg.connect(results) as con:
            cur = con.execute(query)
            frame = pd.DataFrame.from_records(cur.fetchall(), columns=[d.name for d in cur.description])
    else:
        import duckdb

        with duckdb.connect(results, read_only=True) as con:
            frame = con.execute(query).df()
    frame["ds"] = pd.to_datetime(frame["ds"]).dt.date
    frame["segment"] = frame["segment"].astype(object).where(frame["segment"].notna(), "(pooled)")
    for name in frame.columns:
        if name in NUMBERS or name in ("anytime_low", "anytime_high", "effective_share"):
            frame[name] = frame[name].astype(float)
    return frame.sort_values([c for c in ("span", *KEY) if c in frame.columns]).reset_index(drop=True)


def _want(table: pd.DataFrame, ds: dt.date) -> pd.DataFrame:
    out = table.assign(ds=ds, segment=table["segment"].astype(object).where(table["segment"].notna(), "(pooled)"))
    return out.sort_values(KEY).reset_index(drop=True)


def _same(got: pd.DataFrame, want: pd.DataFrame) -> None:
    assert got[KEY].values.tolist() == want[KEY].values.tolist()
    np.testing.assert_allclose(got[NUMBERS].to_numpy(float), want[NUMBERS].to_numpy(float), rtol=1e-12, atol=1e-14)
    assert got["status"].str.replace(r"(^|,)warning", "", regex=True).str.strip(",").replace("", "ok").tolist() == \
        want["status"].tolist()


@pytest.mark.parametrize("sink", ["duckdb", pytest.param("postgres", marks=pytest.mark.postgres)])
def test_backfill_writes_per_segment_and_pooled_rows_and_a_rerun_changes_nothing(sink, lake, tmp_path, monkeypatch,
                                                                               capsys, airflow_db, request):
    args, exp, days = lake
    results = request.getfixturevalue("postgres_url") if sink == "postgres" else str(tmp_path / "results.duckdb")
    monkeypatch.chdir(tmp_path)
    assert main(["backfill", *args, "--results", results]) == 0, capsys.readouterr().err[-3000:]
    daily, to_date = _read(results, "arm_estimates"), _read(results, "arm_estimates_to_date")
    assert set(daily["segment"]) == {"(pooled)", "hatch", "wicket"}
    revenue = daily["metric"] == "revenue_per_auction"
    assert set(daily.loc[revenue, "cluster"]) == {"bidder"}  # 500 bidder ids, 1500 auctions a day: by bidder
    for day, bids in days.items():
        _same(daily[daily["ds"] == day].reset_index(drop=True), _want(estimate_arms(bids, exp).table, day))
    last = START + dt.timedelta(days=DAYS - 1)
    pieces = [p for day, bids in days.items() for p in stratum_pieces(bids, exp, day=day, cluster="bidder")]
    full = combine_pieces(pieces, exp, cluster="bidder").table
    mine = to_date[to_date["ds"] == last].reset_index(drop=True)
    _same(mine, _want(full, last))
    assert set(mine["n_days_used"]) == {DAYS}
    pooled = mine[(mine["segment"] == "(pooled)") & (mine["metric"] == "revenue_per_auction")]
    assert pooled["n_auctions"].max() == sum(b["auction_id"].nunique() for b in days.values())
    lift = _read(results, "arm_lift")
    assert set(lift.loc[lift["arm"] == "tall", "segment"]) == {"(pooled)", "hatch", "wicket"}
    assert lift["revenue_per_auction"].notna().all()  # the join found each segment's own revenue row
    pieces_before = _read(results, "stratum_pieces")
    assert set(pieces_before["segment"]) == {"hatch", "wicket"}

    assert main(["backfill", *args, "--results", results]) == 0, capsys.readouterr().err[-3000:]
    for table, before in (("arm_estimates", daily), ("arm_estimates_to_date", to_date),
                          ("stratum_pieces", pieces_before)):
        after = _read(results, table)
        keep = [c for c in before.columns if c not in ("run_id", "computed_at")]
        sort = [c for c in ("ds", "arm", "segment", "metric", "n_bidders", "shard") if c in keep]
        pd.testing.assert_frame_equal(after[keep].sort_values(sort).reset_index(drop=True),
                                      before[keep].sort_values(sort).reset_index(drop=True))
