"""One day through the daily DAG under a real scheduler, task by task: CPU time and peak RSS of each task process (not a test).

The lake day and spec of ``bench_dag_steps.py`` (``--millions`` million bids, string ids), run the way
tests/dags/test_scheduler.py runs the DAG: a dag-processor, an api-server (execution API only) and a
scheduler with the LocalExecutor against a fresh SQLite Airflow home, and one backfill run of the day
queued with ``airflow backfill create``. Under this executor every task runs in a process of its own,
which parses the DAG file and imports what its step needs before it starts: the per-task fixed cost
that ``dag.test()`` (one process for every task) hides.

While the run lasts, every process under the three Airflow processes is sampled from ``/proc`` every
0.1 s (CPU = user + sys, and ``VmHWM``, the peak RSS); each task instance's process is the ``pid``
Airflow records for it. The table lists, per task: wall (Airflow's ``duration``), CPU and peak RSS
of its process (sampled: the last 0.1 s of a task may be missed), then the CPU of the Airflow
processes themselves (scheduler, executor workers, dag-processor, api-server, ``os.wait4``) over
the whole run, headed by the load average. Timings on a shared machine are inflated, CPU less so.

Usage: python tests/benchmarks/bench_dag_scheduler.py --data DIR [--millions 1]
"""

from __future__ import annotations

import argparse
import os
import secrets
import shutil
import signal
import socket
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_dag_steps import DAY, SPEC, _loadavg, write_lake  # noqa: E402

AIRFLOW = str(Path(sys.executable).with_name("airflow"))
DAG_FILE = Path(__file__).resolve().parents[2] / "dags_example" / "daily.py"
TIMEOUT = 1800  # seconds for the run once the processes are up
TICKS = os.sysconf("SC_CLK_TCK")


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _query(db: Path, sql: str) -> list[tuple]:
    try:
        with sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=5) as con:
            return con.execute(sql).fetchall()
    except sqlite3.OperationalError:  # locked, or not created yet
        return []


def _proc(pid: int) -> tuple[int, float, int] | None:
    """(parent pid, CPU seconds, peak RSS bytes) of a live process, or None."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
        status = Path(f"/proc/{pid}/status").read_text()
    except OSError:
        return None
    fields = stat[stat.rindex(")") + 2:].split()
    hwm = next((int(line.split()[1]) * 1024 for line in status.splitlines() if line.startswith("VmHWM:")), 0)
    return int(fields[1]), (int(fields[11]) + int(fields[12])) / TICKS, hwm


class Sampler:
    """CPU and peak RSS of every descendant of ``roots`` (the largest values seen), sampled every 0.1 s."""

    def __init__(self, roots: list[int]):
        self.roots, self.seen, self.stop = set(roots), {}, threading.Event()
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def _run(self) -> None:
        while not self.stop.is_set():
            table = {int(p): _proc(int(p)) for p in os.listdir("/proc") if p.isdigit()}
            tree = set(self.roots)
            for _ in range(6):  # descendants, a few levels down
                tree |= {p for p, v in table.items() if v is not None and v[0] in tree}
            for p in tree:  # the largest CPU and peak seen: an exited process (a zombie) reports no VmHWM
                if table.get(p):
                    _, cpu, hwm = table[p]
                    before = self.seen.get(p, (0, 0.0, 0))
                    self.seen[p] = (table[p][0], max(cpu, before[1]), max(hwm, before[2]))
            time.sleep(0.1)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--data", required=True, type=Path)
    p.add_argument("--millions", type=int, default=1)
    args = p.parse_args(argv)
    spec, lake = args.data / "spec.yaml", args.data / f"lake_{args.millions}M"
    args.data.mkdir(parents=True, exist_ok=True)
    spec.write_text(SPEC)
    write_lake(lake, args.millions, spec)
    work = args.data / f"run_{args.millions}M_scheduler"
    shutil.rmtree(work, ignore_errors=True)
    home, dags, logs = work / "airflow", work / "dags", work / "logs"
    for d in (home, dags, logs, work / "pyconf"):
        d.mkdir(parents=True)
    shutil.copy(DAG_FILE, dags / "counterbid_daily.py")
    (work / "pyconf" / "counterbid_sqlite_args.py").write_text("connect_args = {'timeout': 30}\n")
    port = _free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith(("AIRFLOW", "COUNTERBID_"))}
    env.update({
        "AIRFLOW_HOME": str(home), "AIRFLOW__CORE__DAGS_FOLDER": str(dags), "AIRFLOW__CORE__LOAD_EXAMPLES": "False",
        "AIRFLOW__CORE__EXECUTOR": "LocalExecutor", "AIRFLOW__CORE__PARALLELISM": "4",
        "AIRFLOW__CORE__DAGS_ARE_PAUSED_AT_CREATION": "False",
        "AIRFLOW__DATABASE__SQL_ALCHEMY_CONN": f"sqlite:///{home / 'airflow.db'}",
        "AIRFLOW__CORE__EXECUTION_API_SERVER_URL": f"http://127.0.0.1:{port}/execution/",
        "AIRFLOW__API_AUTH__JWT_SECRET": secrets.token_hex(16), "AIRFLOW__API__SECRET_KEY": secrets.token_hex(16),
        "AIRFLOW__DAG_PROCESSOR__REFRESH_INTERVAL": "5", "AIRFLOW__SCHEDULER__SCHEDULER_HEARTBEAT_SEC": "2",
        "AIRFLOW__LOGGING__BASE_LOG_FOLDER": str(logs / "tasks"),
        "AIRFLOW__DATABASE__SQL_ALCHEMY_CONNECT_ARGS": "counterbid_sqlite_args.connect_args",
        "PYTHONPATH": os.pathsep.join(x for x in (str(work / "pyconf"), os.environ.get("PYTHONPATH", "")) if x),
        "COUNTERBID_LAKE": str(lake), "COUNTERBID_SPEC": str(spec), "COUNTERBID_RESULTS": str(work / "results.duckdb"),
        "COUNTERBID_STAGING": str(work / "staging"), "COUNTERBID_START": DAY.isoformat(), "COUNTERBID_RETRIES": "0",
        "COUNTERBID_CATCHUP": "false",
    })

    def airflow(*a: str) -> None:
        for _ in range(3):  # SQLite is shared: retry a write that lost the lock
            done = subprocess.run([AIRFLOW, *a], env=env, capture_output=True, text=True, timeout=300)
            if done.returncode == 0 or "database is locked" not in done.stderr + done.stdout:
                break
            time.sleep(2)
        if done.returncode != 0:
            raise SystemExit(f"airflow {' '.join(a)}: {done.stderr[-1500:]}")

    airflow("db", "migrate")
    airflow("pools", "set", "counterbid_results_writer", "1", "serializes writers of the results database")
    db, procs = home / "airflow.db", {}
    print(f"{args.millions}M bids, LocalExecutor; load average before: {_loadavg()}", flush=True)

    def start(name: str, *a: str) -> None:
        with open(logs / f"{name}.log", "w") as log:
            procs[name] = subprocess.Popen([AIRFLOW, name, *a], env=env, stdout=log, stderr=subprocess.STDOUT,
                                           stdin=subprocess.DEVNULL, start_new_session=True)

    def wait(what: str, predicate, every: float = 1.0):
        deadline = time.monotonic() + TIMEOUT
        while time.monotonic() < deadline:
            value = predicate()
            if value:
                return value
            dead = [n for n, pr in procs.items() if pr.poll() is not None]
            if dead:
                raise SystemExit(f"airflow {dead[0]} exited while waiting for {what}: see {logs / dead[0]}.log")
            time.sleep(every)
        raise SystemExit(f"timed out waiting for {what}")

    usage: dict[str, float] = {}
    try:
        start("dag-processor")
        sampler = Sampler([procs["dag-processor"].pid])
        wait("the DAG to be serialized", lambda: _query(db, "select 1 from serialized_dag where dag_id = 'counterbid_daily'"))
        airflow("backfill", "create", "--dag-id", "counterbid_daily", "--from-date", DAY.isoformat(),
                "--to-date", DAY.isoformat(), "--max-active-runs", "1")
        start("api-server", "--host", "127.0.0.1", "--port", str(port), "--apps", "execution", "--workers", "1")
        start("scheduler")
        sampler.roots |= {procs["api-server"].pid, procs["scheduler"].pid}
        t0 = time.monotonic()
        backfill = "select run_id, state from dag_run where dag_id = 'counterbid_daily' and run_type = 'backfill'"
        run_id, state = wait("the backfill run to finish",
                             lambda: next((r for r in _query(db, backfill) if r[1] in ("success", "failed")), None), every=0.5)
        wall = time.monotonic() - t0
        time.sleep(0.5)
    finally:
        for name, proc in procs.items():
            if proc.poll() is None:
                os.killpg(proc.pid, signal.SIGTERM)
        for name, proc in procs.items():
            try:
                _, _, ru = os.wait4(proc.pid, 0)
                usage[name] = ru.ru_utime + ru.ru_stime
            except ChildProcessError:
                pass
        sampler.stop.set()
    tasks = _query(db, f"select task_id, map_index, state, duration, pid from task_instance where run_id = '{run_id}' "
                       "order by start_date")
    rows = ["| task | state | wall s | CPU s (its process) | peak RSS MiB |", "| --- | --- | ---: | ---: | ---: |"]
    total = 0.0
    for task_id, map_index, st, duration, pid in tasks:
        cpu, hwm = (sampler.seen.get(pid) or (0, float("nan"), float("nan")))[1:]
        total += cpu if cpu == cpu else 0.0
        name = task_id + (f"[{map_index}]" if map_index >= 0 else "")
        rows.append(f"| {name} | {st} | {duration or float('nan'):.2f} | {cpu:.2f} | {hwm / 2**20:.0f} |")
    rows.append(f"| task processes, total | {state} | {wall:.2f} (run) | {total:.2f} | |")
    for name, cpu in usage.items():
        rows.append(f"| airflow {name} (whole run, with its reaped children) | | | {cpu:.2f} | |")
    print("\n".join(rows))
    print(f"load average after: {_loadavg()}")
    return 0 if state == "success" else 1


if __name__ == "__main__":
    sys.exit(main())
