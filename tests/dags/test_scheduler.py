"""The documented backfill path (docs/pipeline.md) with a real scheduler: api-server, scheduler and dag-processor against a
temporary SQLite home with the LocalExecutor, and a 3-day backfill queued with Airflow's own
``airflow backfill create`` exactly as docs/pipeline.md writes it. The days run one after another, in
order, and every results table equals, row by row, what ``counterbid backfill`` (the same DAG under
``dag.test``, in its own process) writes from the same lake."""

from __future__ import annotations

import datetime as dt
import os
import secrets
import shutil
import signal
import socket
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import duckdb
import pandas as pd
import pyarrow.dataset as pads
import pytest

from counterbid.dags_example.lake import write_bid_lake
from counterbid.estimators import estimate_arms, load_experiments

from .conftest import SPEC_TEXT, START

pytestmark = pytest.mark.slow

DAYS = [START + dt.timedelta(days=k) for k in range(3)]
#: The documented command (docs/pipeline.md, section "Backfills"); the test runs it with these days. Without
#: `--max-active-runs 1` Airflow starts up to 10 backfill runs at once (the DAG's own
#: max_active_runs does not bound a backfill), and a day's to-date rows then miss the days before it.
README_BACKFILL = "airflow backfill create --dag-id counterbid_daily --from-date {first} --to-date {last} --max-active-runs 1"
TIMEOUT = 900  # seconds for the whole run once the processes are up (days one at a time: 3-6 min on the loaded 2-core machine)
CLI_TIMEOUT = 600  # seconds for `counterbid backfill`, which runs beside the scheduler
#: Columns that record when and by which run a row was written, not what it says.
PROVENANCE = ("run_id", "computed_at", "checked_at", "migrated_at")
AIRFLOW = str(Path(sys.executable).with_name("airflow"))


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _query(db: Path, sql: str, args=()) -> list[tuple]:
    try:
        with sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=5) as con:
            return con.execute(sql, args).fetchall()
    except sqlite3.OperationalError:  # locked or table not created yet: ask again later
        return []


def _wait(what: str, predicate, *, deadline: float, procs: dict, logs: Path, every: float = 1.0):
    while time.monotonic() < deadline:
        value = predicate()
        if value:
            return value
        for name, proc in procs.items():
            if proc.poll() is not None:
                tail = (logs / f"{name}.log").read_text(errors="replace")[-3000:]
                pytest.fail(f"airflow {name} exited with {proc.returncode} while waiting for {what}:\n{tail}")
        time.sleep(every)
    tails = "\n".join(f"--- {n}\n{(logs / f'{n}.log').read_text(errors='replace')[-1500:]}" for n in procs)
    pytest.fail(f"timed out waiting for {what}\n{tails}")


def _stop(procs: dict) -> None:
    for proc in procs.values():  # each runs in its own session: signal its whole group (workers too)
        if proc.poll() is None:
            try:
                os.killpg(proc.pid, signal.SIGTERM)
            except ProcessLookupError:
                pass
    end = time.monotonic() + 30
    for proc in procs.values():
        try:
            proc.wait(timeout=max(0.1, end - time.monotonic()))
        except subprocess.TimeoutExpired:
            try:
                os.killpg(proc.pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
            proc.wait(timeout=10)


def _start_counterbid_backfill(tmp_path: Path, spec: Path) -> tuple[subprocess.Popen, Path]:
    """``counterbid backfill`` over the same lake and days, in its own process and Airflow home."""
    results = tmp_path / "cli.duckdb"
    env = {k: v for k, v in os.environ.items() if not k.startswith(("AIRFLOW", "COUNTERBID_"))}
    log = open(tmp_path / "logs" / "counterbid-backfill.log", "w")
    proc = subprocess.Popen([str(Path(sys.executable).with_name("counterbid")), "backfill", "--lake", str(tmp_path / "bids"),
                             "--experiments", str(spec), "--results", str(results), "--start", DAYS[0].isoformat(),
                             "--end", DAYS[-1].isoformat(), "--staging", str(tmp_path / "cli-staging")],
                            env=env, stdout=log, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, start_new_session=True)
    log.close()
    return proc, results


def _tables(path: Path) -> dict[str, pd.DataFrame]:
    """Every base table of a results database without its provenance columns, rows in one order."""
    with duckdb.connect(str(path), read_only=True) as con:
        names = [n for (n,) in con.execute("select table_name from information_schema.tables "
                                           "where table_type = 'BASE TABLE' order by 1").fetchall()]
        out = {}
        for name in names:
            columns = [c for (c,) in con.execute("select column_name from information_schema.columns where table_name = ? "
                                                 "order by ordinal_position", [name]).fetchall() if c not in PROVENANCE]
            listed = ", ".join(f'"{c}"' for c in columns)
            out[name] = con.execute(f'select {listed} from "{name}" order by all').df()
    return out


def test_readme_shows_the_backfill_command_tested_here():
    readme = (Path(__file__).resolve().parents[2] / "docs" / "pipeline.md").read_text()
    assert README_BACKFILL.format(first="2026-03-02", last="2026-03-15") in readme


@pytest.mark.timeout(1800)  # airflow db migrate, a scheduler, three runs and a counterbid backfill, each with a deadline
def test_backfill_create_runs_the_days_in_order_and_writes_what_counterbid_backfill_writes(tmp_path):
    home, dags, logs = tmp_path / "airflow", tmp_path / "dags", tmp_path / "logs"
    for d in (home, dags, logs):
        d.mkdir()
    shutil.copy(Path(__file__).resolve().parents[2] / "dags_example" / "daily.py", dags / "counterbid_daily.py")
    spec = tmp_path / "spec.yaml"
    spec.write_text(SPEC_TEXT)
    experiments = load_experiments(spec)
    write_bid_lake(tmp_path / "bids", experiments.values(), start=START, days=3, auctions_per_day=1500, n_bidders=4, seed=31)
    cli, cli_results = _start_counterbid_backfill(tmp_path, spec)
    # every Airflow process waits up to 30 s for SQLite's write lock instead of failing after 5 s
    (tmp_path / "pyconf").mkdir()
    (tmp_path / "pyconf" / "counterbid_sqlite_args.py").write_text("connect_args = {'timeout': 30}\n")
    port = _free_port()
    results = tmp_path / "results.duckdb"
    env = {k: v for k, v in os.environ.items() if not k.startswith(("AIRFLOW", "COUNTERBID_"))}
    env.update({
        "AIRFLOW_HOME": str(home),
        "AIRFLOW__CORE__DAGS_FOLDER": str(dags),
        "AIRFLOW__CORE__LOAD_EXAMPLES": "False",
        "AIRFLOW__CORE__EXECUTOR": "LocalExecutor",
        "AIRFLOW__CORE__PARALLELISM": "4",
        "AIRFLOW__CORE__DAGS_ARE_PAUSED_AT_CREATION": "False",
        "AIRFLOW__DATABASE__SQL_ALCHEMY_CONN": f"sqlite:///{home / 'airflow.db'}",
        "AIRFLOW__CORE__EXECUTION_API_SERVER_URL": f"http://127.0.0.1:{port}/execution/",
        "AIRFLOW__API_AUTH__JWT_SECRET": secrets.token_hex(16),
        "AIRFLOW__API__SECRET_KEY": secrets.token_hex(16),
        "AIRFLOW__DAG_PROCESSOR__REFRESH_INTERVAL": "5",
        "AIRFLOW__SCHEDULER__SCHEDULER_HEARTBEAT_SEC": "2",
        "AIRFLOW__LOGGING__BASE_LOG_FOLDER": str(logs / "tasks"),
        "AIRFLOW__DATABASE__SQL_ALCHEMY_CONNECT_ARGS": "counterbid_sqlite_args.connect_args",
        "PYTHONPATH": os.pathsep.join(p for p in (str(tmp_path / "pyconf"), os.environ.get("PYTHONPATH", "")) if p),
        "COUNTERBID_LAKE": str(tmp_path / "bids"),
        "COUNTERBID_SPEC": str(spec),
        "COUNTERBID_RESULTS": str(results),
        "COUNTERBID_STAGING": str(tmp_path / "staging"),
        "COUNTERBID_START": START.isoformat(),
        "COUNTERBID_RETRIES": "0",
        # no catchup: the scheduler itself then creates only the latest interval's run (a day
        # without bids, which fails at its load step); the three days come from the backfill alone
        "COUNTERBID_CATCHUP": "false",
    })

    def airflow(*args, timeout=120, attempts=3):
        for attempt in range(attempts):  # SQLite is shared by every process: retry a write that lost the lock
            done = subprocess.run([AIRFLOW, *args], env=env, capture_output=True, text=True, timeout=timeout)
            if done.returncode == 0 or "database is locked" not in done.stderr + done.stdout:
                break
            time.sleep(2)
        assert done.returncode == 0, f"airflow {' '.join(args)}:\n{done.stdout[-2000:]}\n{done.stderr[-2000:]}"
        return done.stdout

    airflow("db", "migrate")
    airflow("pools", "set", "counterbid_results_writer", "1", "serializes writers of the results database")
    db = home / "airflow.db"
    procs: dict[str, subprocess.Popen] = {}
    try:
        def start(name, *args):
            with open(logs / f"{name}.log", "w") as log:
                procs[name] = subprocess.Popen([AIRFLOW, name, *args], env=env, stdout=log, stderr=subprocess.STDOUT,
                                               stdin=subprocess.DEVNULL, start_new_session=True)

        deadline = time.monotonic() + TIMEOUT
        start("dag-processor")
        _wait("the DAG to be serialized", lambda: _query(db, "select 1 from serialized_dag where dag_id = 'counterbid_daily'"),
              deadline=deadline, procs=procs, logs=logs)
        # the documented command, queued before the scheduler starts writing to the same SQLite file
        airflow(*README_BACKFILL.format(first=DAYS[0], last=DAYS[-1]).split()[1:])
        assert _query(db, "select max_active_runs from backfill") == [(1,)]
        start("api-server", "--host", "127.0.0.1", "--port", str(port), "--apps", "execution", "--workers", "1")
        start("scheduler")
        finished = ("success", "failed")

        def all_done():
            rows = _query(db, "select state from dag_run where dag_id = 'counterbid_daily' and run_type = 'backfill'")
            return rows if len(rows) == 3 and all(r[0] in finished for r in rows) else None

        _wait("three backfill runs to finish", all_done, deadline=deadline, procs=procs, logs=logs, every=2)
        runs = _query(db, "select logical_date, state, start_date, end_date from dag_run "
                          "where dag_id = 'counterbid_daily' and run_type = 'backfill' order by logical_date")
        failed = _query(db, "select run_id, task_id, map_index, state from task_instance where state != 'success'")
    finally:
        _stop(procs)
    assert all(p.poll() is not None for p in procs.values())
    assert [(d[:10], s) for d, s, _, _ in runs] == [(str(day), "success") for day in DAYS], failed
    # in order, one at a time: each day starts after the day before it ended
    for (_, _, _, ended), (day, _, started, _) in zip(runs, runs[1:]):
        assert started >= ended, f"{day[:10]} started at {started}, before the day before it ended at {ended}"
    try:
        assert cli.wait(timeout=max(10.0, CLI_TIMEOUT - (time.monotonic() - deadline + TIMEOUT))) == 0, \
            (logs / "counterbid-backfill.log").read_text()[-3000:]
    finally:
        if cli.poll() is None:
            os.killpg(cli.pid, signal.SIGKILL)
            cli.wait(timeout=10)

    # every results table, row by row, as `counterbid backfill` wrote it (provenance columns aside)
    scheduled, in_process = _tables(results), _tables(cli_results)
    assert sorted(scheduled) == sorted(in_process)
    assert {"arm_estimates", "arm_estimates_to_date", "stratum_pieces", "data_checks"} <= set(scheduled)
    for name in sorted(scheduled):
        pd.testing.assert_frame_equal(scheduled[name], in_process[name], check_exact=True, obj=name)
    daily, to_date = scheduled["arm_estimates"], scheduled["arm_estimates_to_date"]
    assert sorted({(e, d.date()) for e, d in zip(daily["experiment_id"], daily["ds"])}) == \
        [(e, d) for e in ("banners", "tiles") for d in DAYS]
    # to-date rows for every day: the warm-up day's without numbers (no day used yet, status warming_up),
    # then each later day combining the days up to it
    assert sorted(set(zip(to_date["ds"].dt.date, to_date["n_days_used"]))) == [(DAYS[0], 0), (DAYS[1], 1), (DAYS[2], 2)]
    pending = to_date[to_date["n_days_used"] == 0]
    assert pending["estimate"].isna().all() and all("warming_up" in s.split(",") for s in pending["status"])

    # and one day against estimate_arms on the lake, outside Airflow
    lake = pads.dataset(str(tmp_path / "bids"), format="parquet", partitioning="hive").to_table().to_pandas()
    lake["ds"] = pd.to_datetime(lake["ds"]).dt.date
    exp = experiments["tiles"]
    want = estimate_arms(lake[(lake["experiment_id"] == "tiles") & (lake["ds"] == DAYS[1])].reset_index(drop=True), exp)
    got = daily[(daily["experiment_id"] == "tiles") & (daily["ds"] == pd.Timestamp(DAYS[1]))]
    merged = want.table.merge(got, on=["arm", "metric"], suffixes=("", "_db"))
    assert len(merged) == len(want.table)
    assert (merged["estimate"] == merged["estimate_db"]).all()
