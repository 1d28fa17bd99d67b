"""Late data under ``dag.test`` with retries on: the example DAG parsed with ``COUNTERBID_RETRIES=2``
and ``COUNTERBID_RETRY_DELAY`` of a few seconds (both read when the DAG is parsed).

A day whose partition folder is missing fails the load step as late data (``MissingPartitionError``,
retryable); the partition landing between two tries lets the retry, and the run, succeed. A
partition that never lands fails the load step after its three tries with the late-data message,
and the failure alert (a real local webhook) is sent once, after the last try.
"""

from __future__ import annotations

import datetime as dt
import os
import shutil
import sqlite3
import threading
import time
from pathlib import Path

import pandas as pd
import pytest

from counterbid.cli.backfill import DAG_ID, dags_folder
from counterbid.dags_example.lake import write_bid_lake
from counterbid.estimators import estimate_arms, load_experiments

from ..alert_servers import HttpSink, http_conn

SPEC_TEXT = """
experiments:
  - id: strips
    control_arm: narrow
    start: 2026-04-06
    arms:
      - {name: narrow, share: 0.6, position_weights: [0.35, 0.15]}
      - {name: broad,  share: 0.4, position_weights: [0.35, 0.2, 0.08]}
"""
FIRST, LATE, NEVER = dt.date(2026, 4, 6), dt.date(2026, 4, 7), dt.date(2026, 4, 8)
DEADLINE = 180  # seconds for one dag.test run (three tries with 1 s delays take about 15 s here)
pytestmark = pytest.mark.slow


@pytest.fixture
def late_lake(tmp_path, monkeypatch, airflow_db):
    """A lake holding FIRST, the LATE partition kept aside, the run parameters, and retries on."""
    spec = tmp_path / "spec.yaml"
    spec.write_text(SPEC_TEXT)
    write_bid_lake(tmp_path / "written", load_experiments(spec).values(), start=FIRST, days=2, auctions_per_day=1500,
                   n_bidders=4, seed=47)
    (tmp_path / "bids").mkdir()
    shutil.move(tmp_path / "written" / f"ds={FIRST}", tmp_path / "bids" / f"ds={FIRST}")
    conf = {"lake_root": str(tmp_path / "bids"), "spec_path": str(spec), "results_database": str(tmp_path / "results.duckdb"),
            "staging_root": str(tmp_path / "staging"), "clicks_root": ""}
    monkeypatch.setenv("COUNTERBID_RETRIES", "2")
    monkeypatch.setenv("COUNTERBID_RETRY_DELAY", "1")
    return tmp_path, conf


def _test_run(day: dt.date, conf: dict) -> tuple[str, dict]:
    """Parse the example DAG now (the environment's settings) and ``dag.test`` one day: run state, load's TI."""
    from airflow.dag_processing.dagbag import DagBag

    bag = DagBag(dag_folder=str(dags_folder()))
    dag = bag.get_dag(DAG_ID)
    assert dag.get_task("experiment.load").retries == 2
    assert dag.get_task("experiment.load").retry_delay == dt.timedelta(seconds=float(os.environ["COUNTERBID_RETRY_DELAY"]))
    run = dag.test(logical_date=dt.datetime.combine(day, dt.time(), tzinfo=dt.timezone.utc), run_conf=conf)
    load = next(ti for ti in run.get_task_instances() if ti.task_id == "experiment.load")
    return str(getattr(run.state, "value", run.state)), {"state": str(getattr(load.state, "value", load.state)),
                                                          "try_number": load.try_number}


def _load_state(db: Path, day: dt.date) -> str | None:
    try:
        with sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=5) as con:
            row = con.execute("select ti.state from task_instance ti join dag_run dr on dr.dag_id = ti.dag_id "
                              "and dr.run_id = ti.run_id where ti.dag_id = ? and ti.task_id = 'experiment.load' "
                              "and dr.logical_date like ?", (DAG_ID, f"{day} %")).fetchone()
    except sqlite3.OperationalError:  # locked by the run: ask again
        return None
    return row[0] if row else None


def test_partition_landing_between_tries_lets_the_retry_succeed(late_lake, airflow_db, monkeypatch, capfd):
    root, conf = late_lake
    monkeypatch.setenv("COUNTERBID_RETRY_DELAY", "3")  # room for the mover, which polls every 0.2 s
    landed: dict = {}

    def land_when_retrying():  # moves the folder in (one rename) once the first try has failed
        end = time.monotonic() + DEADLINE
        while time.monotonic() < end:
            if _load_state(Path(airflow_db) / "airflow.db", LATE) == "up_for_retry":
                shutil.move(root / "written" / f"ds={LATE}", root / "bids" / f"ds={LATE}")
                landed["at"] = time.monotonic()
                return
            time.sleep(0.2)

    mover = threading.Thread(target=land_when_retrying, daemon=True)
    mover.start()
    state, load = _test_run(LATE, conf)
    mover.join(timeout=DEADLINE)
    log = capfd.readouterr()
    log = log.out + log.err
    assert "at" in landed, "the first try never reached up_for_retry\n" + log[-3000:]
    assert f"partition ds={LATE} is missing (no such folder)" in log  # the first try's reason
    assert (state, load) == ("success", {"state": "success", "try_number": 2}), log[-3000:]
    # the retry read the partition that landed: the stored rows are estimate_arms of that day
    import duckdb

    with duckdb.connect(conf["results_database"], read_only=True) as con:
        got = con.execute("select arm, metric, estimate from arm_estimates where ds = ? order by all", [LATE]).df()
    bids = pd.read_parquet(root / "bids" / f"ds={LATE}" / "strips.parquet")
    want = estimate_arms(bids, load_experiments(conf["spec_path"])["strips"]).table
    merged = want.merge(got, on=["arm", "metric"], suffixes=("", "_db"), validate="one_to_one")
    assert len(merged) == len(want) == len(got)
    assert (merged["estimate"] == merged["estimate_db"]).all()


def test_partition_that_never_lands_fails_after_the_retries(late_lake, monkeypatch, capfd):
    root, conf = late_lake
    with HttpSink(204) as sink:
        monkeypatch.setenv("COUNTERBID_ALERT_TARGET", "webhook")
        monkeypatch.setenv("COUNTERBID_ALERT_CONN", "quillfen_late")
        monkeypatch.setenv("AIRFLOW_CONN_QUILLFEN_LATE", http_conn(sink.url))
        started = time.monotonic()
        state, load = _test_run(NEVER, conf)
        elapsed = time.monotonic() - started
    log = capfd.readouterr()
    log = log.out + log.err
    message = f"{conf['lake_root']}: partition ds={NEVER} is missing (no such folder)"
    assert (state, load) == ("failed", {"state": "failed", "try_number": 3}), log[-3000:]
    assert log.count(f"MissingPartitionError: {message}") >= 3, log[-3000:]  # each try says why
    assert elapsed < DEADLINE
    # one alert, after the last try (a retry is not a failure), naming the late data
    assert [r["body"]["text"] for r in sink.received] == [
        f"{DAG_ID}.experiment.load {NEVER}: failed before its data checks were recorded: MissingPartitionError: {message}"
    ]
