"""Results tables against a real DuckDB file: idempotent replace, dedupe, rollback, views, locks."""

from __future__ import annotations

import datetime as dt
import subprocess
import sys
import textwrap
import time

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pytest

from counterbid.operators.hooks import ResultsHook, is_lock_error

D1, D2 = dt.date(2026, 3, 2), dt.date(2026, 3, 3)
NOW = pd.Timestamp("2026-03-04 01:00", tz="UTC")


def _rows(exp, ds, *, estimate=1.0, run_id="r1", computed_at=NOW, to_date=False, status="ok", level=0.95,
          cluster="auction", payment_rule="gsp", floor=0.05):
    rows = []
    for arm, metric, est in [
        ("plain", "revenue_per_auction", estimate),
        ("bold", "revenue_per_auction", estimate * 1.1),
        ("bold", "revenue_lift_vs_control", 0.1),
        ("_mixture", "revenue_per_auction", estimate),
    ]:
        row = dict(experiment_id=exp, ds=ds, arm=arm, metric=metric, estimate=est, std_error=0.01,
                   ci_low=est - 0.02, ci_high=est + 0.02, n_auctions=100, n_bids=400, status=status,
                   confidence_level=level, cluster=cluster, payment_rule=payment_rule, floor=floor,
                   method_version="ordstat-1", run_id=run_id, computed_at=computed_at, what_if=False,
                   effective_share=np.nan, segment=None)
        if to_date:
            row.update(first_ds=D1, days_used=f"{D1}..{ds}" if ds != D1 else str(D1), days_left_out="",
                       n_days_used=(ds - D1).days + 1, n_days_left_out=0, anytime_low=est - 0.03,
                       anytime_high=est + 0.03, anytime_horizon_auctions=2800)
        rows.append(row)
    return pa.Table.from_pandas(pd.DataFrame(rows), preserve_index=False)


def _all(hook, table):
    with hook.connect(read_only=True) as con:
        order = "span, experiment_id, ds, arm" if table == "arm_lift" else "experiment_id, ds, arm, metric"
        return con.execute(f"select * from {table} order by {order}").df()


def test_replace_is_idempotent_and_scoped(hook):
    hook.replace_partition(experiment_id="tiles", ds=D1, tables={"arm_estimates": _rows("tiles", D1)})
    hook.replace_partition(experiment_id="tiles", ds=D2, tables={"arm_estimates": _rows("tiles", D2)})
    first = _all(hook, "arm_estimates")
    assert len(first) == 8
    # a rerun of the same day with the same numbers changes nothing
    hook.replace_partition(experiment_id="tiles", ds=D1, tables={"arm_estimates": _rows("tiles", D1)})
    pd.testing.assert_frame_equal(_all(hook, "arm_estimates"), first)
    # a rerun with new numbers replaces that day only
    hook.replace_partition(experiment_id="tiles", ds=D1, tables={"arm_estimates": _rows("tiles", D1, estimate=2.0, run_id="r2")})
    after = _all(hook, "arm_estimates")
    assert len(after) == 8
    assert set(after.loc[after["ds"] == pd.Timestamp(D1), "run_id"]) == {"r2"}
    assert set(after.loc[after["ds"] == pd.Timestamp(D2), "run_id"]) == {"r1"}


def test_duplicate_keys_in_one_batch_keep_the_latest(hook):
    old = _rows("tiles", D1, estimate=1.0, run_id="old", computed_at=NOW)
    new = _rows("tiles", D1, estimate=3.0, run_id="new", computed_at=NOW + pd.Timedelta(minutes=5))
    hook.replace_partition(experiment_id="tiles", ds=D1, tables={"arm_estimates": pa.concat_tables([old, new])})
    got = _all(hook, "arm_estimates")
    assert len(got) == 4 and set(got["run_id"]) == {"new"}


def test_rows_of_another_partition_in_the_batch_are_not_written(hook):
    batch = pa.concat_tables([_rows("tiles", D1), _rows("tiles", D2)])
    counts = hook.replace_partition(experiment_id="tiles", ds=D1, tables={"arm_estimates": batch})
    assert counts == {"arm_estimates": 8}
    assert set(_all(hook, "arm_estimates")["ds"]) == {pd.Timestamp(D1)}


def test_failed_write_rolls_back_everything(hook):
    hook.replace_partition(experiment_id="tiles", ds=D1, tables={
        "arm_estimates": _rows("tiles", D1), "arm_estimates_to_date": _rows("tiles", D1, to_date=True)})
    before_daily, before_cum = _all(hook, "arm_estimates"), _all(hook, "arm_estimates_to_date")
    bad = _rows("tiles", D1, to_date=True, status="")  # violates the status check constraint
    with pytest.raises(duckdb.ConstraintException):
        hook.replace_partition(experiment_id="tiles", ds=D1, tables={
            "arm_estimates": _rows("tiles", D1, estimate=9.0, run_id="r9"), "arm_estimates_to_date": bad})
    pd.testing.assert_frame_equal(_all(hook, "arm_estimates"), before_daily)
    pd.testing.assert_frame_equal(_all(hook, "arm_estimates_to_date"), before_cum)


@pytest.mark.parametrize("column,value", [
    ("status", ""), ("status", "warning, few_bids"), ("status", "Warning"), ("status", "ok,"),
    ("level", 1.0), ("level", 0.0), ("cluster", "auto"), ("cluster", "arm"),
    ("payment_rule", "english"), ("floor", -0.01)])
def test_stored_status_level_and_cluster_are_constrained(hook, column, value):
    with pytest.raises(duckdb.ConstraintException):
        hook.replace_partition(experiment_id="tiles", ds=D1, tables={"arm_estimates": _rows("tiles", D1, **{column: value})})
    assert _all(hook, "arm_estimates").empty


def test_flags_level_and_cluster_are_stored_and_reach_the_views(hook):
    hook.replace_partition(experiment_id="tiles", ds=D1, tables={
        "arm_estimates": _rows("tiles", D1, status="few_bids,warning", level=0.975, cluster="bidder"),
        "arm_estimates_to_date": _rows("tiles", D1, to_date=True, status="degenerate", level=0.9, cluster="bidder")})
    daily = _all(hook, "arm_estimates")
    assert set(daily["status"]) == {"few_bids,warning"} and set(daily["confidence_level"]) == {0.975}
    lift = _all(hook, "arm_lift").set_index("span")
    assert lift.loc["to_date", ["confidence_level", "cluster", "status"]].tolist() == [0.9, "bidder", "degenerate"]
    assert lift.loc["day", ["confidence_level", "cluster"]].tolist() == [0.975, "bidder"]
    cum = hook.fetch_df("report_cumulative")
    assert set(zip(cum["confidence_level"], cum["cluster"])) == {(0.9, "bidder")}
    assert set(zip(daily["payment_rule"], daily["floor"])) == {("gsp", 0.05)}


def test_cumulative_view_shows_the_latest_day_per_experiment(hook):
    for exp in ("tiles", "banners"):
        for ds in (D1, D2):
            if exp == "banners" and ds == D2:
                continue
            hook.replace_partition(experiment_id=exp, ds=ds, tables={
                "arm_estimates_to_date": _rows(exp, ds, estimate=ds.day, to_date=True)})
    view = _all(hook, "arm_estimates_cumulative")
    latest = view.groupby("experiment_id")["ds"].agg(["min", "max"])
    assert latest.loc["tiles", "min"] == latest.loc["tiles", "max"] == pd.Timestamp(D2)
    assert latest.loc["banners", "max"] == pd.Timestamp(D1)
    assert len(view) == 8


def test_lift_view_pairs_lift_with_revenue(hook):
    hook.replace_partition(experiment_id="tiles", ds=D1, tables={
        "arm_estimates": _rows("tiles", D1, estimate=2.0),
        "arm_estimates_to_date": _rows("tiles", D1, estimate=1.5, to_date=True)})
    lift = _all(hook, "arm_lift").sort_values("span").reset_index(drop=True)
    assert lift["span"].tolist() == ["day", "to_date"]
    assert lift["arm"].tolist() == ["bold", "bold"]
    assert lift["lift"].tolist() == [0.1, 0.1]
    assert lift["revenue_per_auction"].tolist() == pytest.approx([2.2, 1.65])


def test_day_check_status_view_reports_the_worst(hook):
    hook.ensure_tables()
    with hook.connect() as con:  # the table as the pipeline creates (ensure_tables) and fills it
        for exp, ds, check, severity, passed in [
                ("tiles", D1, "a", "error", True), ("tiles", D1, "b", "warning", True),
                ("tiles", D2, "a", "error", True), ("tiles", D2, "b", "warning", False),
                ("banners", D2, "a", "error", False)]:
            con.execute(hook.sql("data_checks_insert"), {
                "experiment_id": exp, "ds": ds, "check": check, "severity": severity, "passed": passed,
                "observed": None, "threshold": None, "details": None, "run_id": "r", "checked_at": NOW})
    assert hook.table_exists("data_checks") and not hook.table_exists("nothing_here")
    got = hook.fetch_df("report_day_check_status", {"experiment_id": "tiles"})
    assert got["worst_status"].tolist() == ["passed", "warning"]
    assert got["n_failed"].tolist() == [0, 1]
    assert hook.fetch_df("report_day_check_status", {"experiment_id": "banners"})["worst_status"].tolist() == ["error"]


def _hold_lock(path, seconds):
    code = textwrap.dedent(f"""
        import duckdb, sys, time
        con = duckdb.connect({str(path)!r})
        print("locked", flush=True)
        time.sleep({seconds})
        con.close()
    """)
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "locked"
    return proc


def test_writer_waits_for_a_lock_held_by_another_process(tmp_path):
    path = tmp_path / "locked.duckdb"
    duckdb.connect(str(path)).close()
    proc = _hold_lock(path, 1.5)
    try:
        started = time.monotonic()
        ResultsHook(database=path, lock_timeout=30).replace_partition(
            experiment_id="tiles", ds=D1, tables={"arm_estimates": _rows("tiles", D1)})
        assert time.monotonic() - started > 0.5  # it did wait for the other process
    finally:
        proc.wait(timeout=30)
    assert len(_all(ResultsHook(database=path), "arm_estimates")) == 4


def test_lock_error_surfaces_after_the_timeout(tmp_path):
    path = tmp_path / "locked.duckdb"
    duckdb.connect(str(path)).close()
    proc = _hold_lock(path, 3)
    try:
        with pytest.raises(duckdb.Error) as info:
            ResultsHook(database=path, lock_timeout=0.3).ensure_tables()
        assert is_lock_error(info.value)
    finally:
        proc.wait(timeout=30)


def test_database_path_from_an_airflow_connection(tmp_path, monkeypatch):
    target = tmp_path / "from-conn.duckdb"
    monkeypatch.setenv("AIRFLOW_CONN_COUNTERBID_RESULTS",
                       '{"conn_type": "counterbid_duckdb", "extra": {"path": "%s"}}' % target)
    hook = ResultsHook()
    assert hook.database == str(target)
    hook.ensure_tables()
    assert hook.table_exists("arm_estimates") and target.exists()
