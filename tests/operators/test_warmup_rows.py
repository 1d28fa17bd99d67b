"""Experiment-to-date rows from the first day: while no day of the window is used they say why.

Before this, a day whose window used no day (burn-in, warm-up) wrote no to-date row at all, so a
dashboard reading ``arm_estimates_cumulative`` showed nothing rather than "warming up". Both sinks.
"""

from __future__ import annotations

import datetime as dt
import json

import pandas as pd
import pytest

from counterbid.dags_example.lake import write_bid_lake
from counterbid.estimators import parse_experiments
from counterbid.estimators.window import analysis_window, pending_status
from counterbid.operators import partition
from counterbid.operators.hooks import ResultsHook
from counterbid.operators.lake_hook import LakeHook
from counterbid.operators.report import cumulative_table, format_cumulative, write_report
from counterbid.operators.schema_gate import schema_gate
from counterbid.operators.staging import StagedPartition

START = dt.date(2026, 6, 1)
DAYS = [START + dt.timedelta(days=k) for k in range(3)]
# An invented catalogue grid whose first two days are burn-in by the spec.
SPEC = {"experiments": [{
    "id": "grid-badges", "control_arm": "quiet", "start": START.isoformat(), "burn_in_days": 2,
    "arms": [{"name": "quiet", "share": 0.5, "position_weights": [0.38, 0.2, 0.06]},
             {"name": "badged", "share": 0.5, "position_weights": [0.44, 0.16, 0.05]}]}]}


@pytest.fixture(scope="module")
def lake(tmp_path_factory):
    root = tmp_path_factory.mktemp("warmup-lake")
    write_bid_lake(root / "bids", parse_experiments(SPEC).values(), start=START, days=3, auctions_per_day=600,
                   n_bidders=4, seed=21)
    return root / "bids"


def _run_days(hook: ResultsHook, lake, staging):
    exp = parse_experiments(SPEC)["grid-badges"]
    seen = []
    for day in DAYS:
        partition.stage_partition(LakeHook(), lake_root=lake, experiment=exp, ds=day, staging_root=staging)
        staged = StagedPartition.at(staging, exp.id, day)
        partition.record_checks(staged, schema_gate(LakeHook(), experiment=exp, staged=staged))
        summary = partition.estimate_partition(hook, experiment=exp, ds=day, staging_root=staging, run_id=f"run-{day}")
        json.dumps(summary, allow_nan=False)  # what XCom stores: strict JSON, no NaN for a warm-up day
        partition.write_partition(hook, experiment_id=exp.id, ds=day, staging_root=staging)
        seen.append(cumulative_table(hook))  # what a dashboard reads after each day
    return seen


def _check_sink(hook: ResultsHook, seen):
    to_date = hook.fetch_df("report_to_date_estimates", {"experiment_id": "grid-badges"})
    daily = hook.fetch_df("report_daily_estimates", {"experiment_id": "grid-badges"})
    per_day = to_date.groupby("ds").size()
    assert per_day.tolist() == daily.groupby("ds").size().tolist() == [len(daily) // 3] * 3  # a row per (arm, metric)
    warm = to_date[pd.to_datetime(to_date["ds"]).dt.date < DAYS[2]]
    assert set(warm["status"]) == {"warming_up"}
    assert warm[["estimate", "std_error", "ci_low", "ci_high"]].isna().all().all()
    assert warm["first_ds"].isna().all() and (warm["n_days_used"] == 0).all() and (warm["n_auctions"] == 0).all()
    assert set(warm["days_left_out"]) == {"2026-06-01 (burn_in)", "2026-06-01..2026-06-02 (burn_in)"}
    kept = to_date[pd.to_datetime(to_date["ds"]).dt.date == DAYS[2]]
    assert kept["estimate"].notna().any() and (kept["n_days_used"] == 1).all()
    assert not kept["status"].str.contains("warming_up").any()
    # the dashboard's view: "warming up" rows from day one, then the numbers
    assert [set(t["status"]) for t in seen[:2]] == [{"warming_up"}] * 2
    assert len(seen[0]) == len(seen[1]) == len(kept) and seen[2]["estimate"].notna().any()
    lift = hook.fetch_df("report_to_date_estimates", {"experiment_id": "grid-badges"})
    assert (lift["metric"] == "revenue_lift_vs_control").sum() == 3  # one non-control arm, three days
    return to_date


def test_warm_up_days_write_rows_without_numbers_on_duckdb(lake, tmp_path):
    hook = ResultsHook(database=tmp_path / "results.duckdb")
    seen = _run_days(hook, lake, tmp_path / "stage")
    _check_sink(hook, seen)
    text = format_cumulative(seen[1])  # the console table mid-warm-up
    assert text.splitlines() == ["grid-badges: to 2026-06-02, no day used yet (status warming_up)",
                                 "days used (0): ; left out (2): 2026-06-01..2026-06-02 (burn_in)"]
    page = write_report(hook, tmp_path / "out").read_text()
    assert "Experiment to date, 2026-06-03 to 2026-06-03" in page  # the report after the warm-up: numbers


@pytest.mark.postgres
def test_warm_up_days_write_the_same_rows_on_postgres(lake, tmp_path, postgres_url):
    duck = ResultsHook(database=tmp_path / "results.duckdb")
    pg = ResultsHook(database=postgres_url)
    _check_sink(duck, _run_days(duck, lake, tmp_path / "stage-duck"))
    _check_sink(pg, _run_days(pg, lake, tmp_path / "stage-pg"))
    keep = ["ds", "first_ds", "arm", "metric", "estimate", "std_error", "n_auctions", "status", "days_left_out", "n_days_used"]
    def rows(hook):
        frame = hook.fetch_df("report_to_date_estimates", {"experiment_id": "grid-badges"})[keep]
        for col in ("ds", "first_ds"):  # the sinks' datetime units differ; compare days
            frame[col] = pd.to_datetime(frame[col]).dt.date
        return frame

    want, got = rows(duck), rows(pg)
    pd.testing.assert_frame_equal(got, want, check_dtype=False, check_exact=False, rtol=1e-12)
    with pg.connect() as con:  # the views a dashboard reads keep working on the warm-up rows
        spans = con.execute("select span, count(*), count(lift) from main.arm_lift group by span order by span").fetchall()
    assert spans == [("day", 3, 3), ("to_date", 3, 1)]


def test_pending_status_names_why():
    exp = parse_experiments(SPEC)["grid-badges"]
    assert pending_status(analysis_window(DAYS[:2], exp)) == "warming_up"
    assert pending_status(analysis_window([DAYS[2]], exp, failed_checks={DAYS[2]: ["warmup"]})) == "warming_up"
    assert pending_status(analysis_window([DAYS[2]], exp, failed_checks={DAYS[2]: ["drift"]})) == "drifting"
    excluded = parse_experiments({"experiments": [dict(SPEC["experiments"][0], burn_in_days=0,
                                                       exclude_days=[DAYS[0].isoformat()])]})["grid-badges"]
    assert pending_status(analysis_window([DAYS[0]], excluded)) == "days_excluded"
    with pytest.raises(ValueError, match="uses 1 day"):
        pending_status(analysis_window([DAYS[2]], exp))
