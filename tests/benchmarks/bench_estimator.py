"""Benchmark of the per-arm estimator against the physical floor (``make bench``; not a test).

Simulates 1M, 5M and 10M bids of a three-arm experiment (5 bidders per auction) once per size,
stores them as Parquet in a temporary folder and measures, each in its own child process:

(a) floor      DuckDB read of the bid column + one ``np.sort``
(a2) input     DuckDB read of the five columns the estimator reads + one ``np.sort`` of the bids
(b) cli        ``counterbid estimate --format json`` end to end (interpreter start to exit)
(b2) cli_text  the same on a copy of the log whose auction and bidder ids are distinct strings
               (``qa-<auction>`` and ``qb-<bidder>-<auction mod 1024>``: 2M auctions, 4.4M bidders at 10M)
(b3) cli_spark ``counterbid estimate --engine spark --spark-master local[2] --format json``: the Spark
               engine in local mode (one JVM, two task threads, Python workers), default shards
(b') estimate  ``read_bids`` + ``estimate_arms`` in one process (time after imports)
(c) sql_realized  the realized per-arm average as a DuckDB GROUP BY (``sql/bench_realized_per_arm.sql``)
(d) pandas     the plain-pandas peer (``plain_pandas_peer.py``)

plus the interpreter baseline (imports only) and one ``counterbid backfill`` day of the daily DAG
on 1M bids. Wall time is measured by the parent around the child; "work" is the time the child
spends after its imports; peak RSS is the child's ``ru_maxrss`` from ``os.wait4``. Each row is
run ``--repeat`` times and the medians are reported. "RSS - imports" subtracts the peak RSS of a
child that only imports the same libraries (DuckDB + numpy for the floors, the full stack for
the rest). The notes also give the machine's cost of touching fresh memory, which on a virtual
machine can dominate: a child's peak RSS is memory it had to fault in. Prints a markdown table;
``--out FILE`` also writes it.

The engines table sets (b) beside (b3). The Spark engine is a process tree (the Python driver,
the JVM it launches, the PySpark daemon and its Python workers), so ``ru_maxrss`` of the command
(one process's peak: here the driver's, as the driver does not reap its JVM) says little: for both rows a thread samples the whole tree every 50 ms and
reports the peak of the summed PSS (shared pages split among their sharers) and of the summed RSS
(:class:`ProcessTreeMemory` says why sampling rather than ``ru_maxrss``, ``/usr/bin/time`` or a
cgroup), with the PSS of the driver, the JVM and the workers at that peak. Spark's settings come
from a ``spark-defaults.conf`` in ``<data>/spark-conf`` (``SPARK_CONF_DIR``; ``--spark-conf
KEY=VALUE`` adds one, e.g. ``spark.driver.memory=2g``); by default it is empty, so the rows show
Spark's defaults. Last, ``compare_engines.py`` estimates one 2M-bid log with both engines (4
shards, clustering by bidder) and its section (largest relative difference over every numeric
cell, non-numeric cells identical or not) is appended to the output.

Usage: python tests/benchmarks/bench_estimator.py [--sizes 1,5,10] [--repeat 3] [--data DIR] [--out FILE]
       [--skip ROWS] [--spark-master local[2]] [--spark-conf KEY=VALUE ...] [--compare-millions 2]
"""

from __future__ import annotations

import argparse
import json
import os
import re
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
SPEC = """
experiments:
  - id: bench
    control_arm: control
    start: 2026-03-02
    arms:
      - {name: control, share: 0.8, position_weights: [0.31, 0.17, 0.06, 0.02]}
      - {name: wide,    share: 0.1, position_weights: [0.29, 0.22, 0.15, 0.02]}
      - {name: five,    share: 0.1, position_weights: [0.29, 0.19, 0.10, 0.05, 0.02]}
"""
N_BIDDERS = 5
#: Master of the Spark rows: local mode, as many worker threads as the 2-core machine has.
SPARK_MASTER = "local[2]"
#: Spark settings of the Spark rows (none: Spark's defaults, a 1g driver heap, which holds 10M bids; in
#: local mode the executors live in the driver's JVM, so that heap is the whole engine's JVM heap).
SPARK_CONF: dict[str, str] = {}
COLUMNS = ["experiment_id", "auction_id", "bidder_id", "arm", "bid", "position"]


# -- children ----------------------------------------------------------------------------------
def child(kind: str, path: str, spec: str) -> dict:
    out: dict = {}
    if kind == "baseline":
        import duckdb  # noqa: F401
        import pandas  # noqa: F401
        import pyarrow.dataset  # noqa: F401
        import scipy.stats  # noqa: F401

        import counterbid.estimators  # noqa: F401
        return {"work": 0.0}
    if kind == "floor_baseline":
        import duckdb  # noqa: F401
        import numpy  # noqa: F401
        return {"work": 0.0}
    if kind == "touch":  # the machine's cost of faulting in fresh memory (400 MiB)
        import numpy as np

        t0 = time.perf_counter()
        np.ones(400 * 2**20 // 8)
        return {"work": time.perf_counter() - t0}
    if kind == "spark_start":  # the JVM and session start of the Spark rows, nothing read
        from counterbid.readers.spark_shards import spark_session

        t0 = time.perf_counter()
        session = spark_session(path)
        session.range(1).count()  # the first job starts the task threads (and the Python workers' daemon)
        out["work"] = time.perf_counter() - t0
        session.stop()
        return out
    if kind == "simulate":
        return _simulate(Path(path), spec)
    if kind == "text_ids":
        return _write_text_ids(Path(path))
    if kind in ("floor", "input"):  # nothing but DuckDB and numpy imported (the SQL file read as text)
        import duckdb
        import numpy as np

        name = "bench_read_bid_column" if kind == "floor" else "bench_read_contract_columns"
        statement = (HERE.parents[1] / "sql" / f"{name}.sql").read_text()
        t0 = time.perf_counter()
        con = duckdb.connect()
        bid = con.execute(statement, {"path": path}).fetchnumpy()["bid"]
        t1 = time.perf_counter()
        np.sort(bid)
        t2 = time.perf_counter()
        return {"work": t2 - t0, "read": t1 - t0, "sort": t2 - t1, "n": int(bid.size)}
    if kind == "sql_realized":
        import duckdb

        from counterbid.estimators import load_experiment
        from counterbid.sql import load_sql

        exp = load_experiment(spec)
        weights = [{"arm": a.name, "position": k, "weight": w}
                   for a in exp.arms for k, w in enumerate(a.position_weights, start=1)]
        t0 = time.perf_counter()
        rows = duckdb.connect().execute(load_sql("bench_realized_per_arm"), {"path": path, "weights": weights}).fetchall()
        out["rows"] = [list(r) for r in rows]
        out["work"] = time.perf_counter() - t0
        return out
    if kind in ("estimate", "pandas"):
        from counterbid.readers.bid_log import read_bids
        from counterbid.estimators import BID_COLUMNS, estimate_arms, load_experiment, prepare_bids

        exp = load_experiment(spec)
        t0 = time.perf_counter()
        bids = read_bids(path, columns=["experiment_id", *BID_COLUMNS])
        t1 = time.perf_counter()
        if kind == "estimate":  # as the command line does it: validate, drop the frame, estimate
            prepared = prepare_bids(bids, exp)
            del bids
            result = estimate_arms(prepared, exp).table
        else:
            sys.path.insert(0, str(HERE))
            from plain_pandas_peer import plain_pandas_estimate

            result = plain_pandas_estimate(bids, exp)
        t2 = time.perf_counter()
        rev = result[result["metric"] == "revenue_per_auction"].set_index("arm")["estimate"]
        return {"work": t2 - t0, "read": t1 - t0, "estimate": t2 - t1, "revenue": rev.round(6).to_dict()}
    raise SystemExit(f"unknown child kind {kind!r}")


# -- parent ------------------------------------------------------------------------------------
class ProcessTreeMemory:
    """Peak memory of a process and all its descendants, sampled every ``interval`` seconds.

    Why sampling: ``ru_maxrss`` (``os.wait4``) is the peak of ONE process: the child's own, or the
    largest among the descendants it reaped, never their sum. The Spark engine is a tree
    (the Python driver, the JVM it launches, the PySpark daemon and the Python workers it forks),
    so a thread walks the tree (``psutil``) and sums, per sample, each process's proportional set
    size (PSS, ``/proc/<pid>/smaps_rollup``: a page shared by k processes counts 1/k, so the
    forked workers and the shared libraries are not counted twice) and, for reference, its RSS
    (which does count shared pages once per process). The peak of those sums is reported. A cgroup's
    ``memory.peak`` would be exact but needs a writable cgroup and also counts the page cache of the
    Parquet files read; ``/usr/bin/time`` reports ``ru_maxrss``, i.e. one process. A spike shorter
    than the interval can be missed; the local engine's sampled RSS against its own ``ru_maxrss``
    (both in the engines table) shows how close the sampling gets.
    """

    def __init__(self, pid: int, interval: float = 0.05):
        import threading

        self.pid, self.interval = pid, interval
        self.peak_pss = self.peak_rss = 0.0  # bytes
        self.max_processes = 0
        self.java_args: list[str] = []
        self.peak_roles: dict[str, float] = {}  # PSS by role at the peak sample
        self.peak_role_rss: dict[str, float] = {}  # each role's own peak RSS (summed over its processes)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    @staticmethod
    def _pss_rss(pid: int) -> tuple[int, int]:
        pss = rss = 0
        with open(f"/proc/{pid}/smaps_rollup") as f:
            for line in f:
                if line.startswith("Pss:"):
                    pss = int(line.split()[1]) * 1024
                elif line.startswith("Rss:"):
                    rss = int(line.split()[1]) * 1024
        return pss, rss

    def _role(self, proc) -> str:
        """``driver`` (the command's own process), ``jvm`` (Spark's JVM, launcher included) or ``workers``."""
        if proc.pid == self.pid:
            return "driver"
        return "jvm" if proc.name() == "java" else "workers"

    def _run(self) -> None:
        import psutil

        try:
            root = psutil.Process(self.pid)
        except psutil.Error:
            return
        while not self._stop.is_set():
            try:
                tree = [root, *root.children(recursive=True)]
            except psutil.Error:
                break
            pss = rss = 0
            roles: dict[str, float] = {}
            role_rss: dict[str, float] = {}
            for proc in tree:
                try:
                    p, r = self._pss_rss(proc.pid)
                    role = self._role(proc)
                    if role == "jvm" and not self.java_args:
                        command = proc.cmdline()  # the application's JVM, not Spark's launcher (-Xmx128m)
                        if "org.apache.spark.launcher.Main" not in command:
                            self.java_args = [a for a in command if a.startswith("-Xmx")] or ["JVM default heap"]
                except (OSError, psutil.Error):  # exited between the listing and the read
                    continue
                pss, rss = pss + p, rss + r
                roles[role] = roles.get(role, 0.0) + p
                role_rss[role] = role_rss.get(role, 0.0) + r
            for role, value in role_rss.items():
                self.peak_role_rss[role] = max(self.peak_role_rss.get(role, 0.0), value)
            if pss > self.peak_pss:
                self.peak_roles = roles
            self.peak_pss, self.peak_rss = max(self.peak_pss, pss), max(self.peak_rss, rss)
            self.max_processes = max(self.max_processes, len(tree))
            self._stop.wait(self.interval)

    def stop(self) -> dict:
        self._stop.set()
        self._thread.join()
        return {"tree_pss_mib": self.peak_pss / 2**20, "tree_rss_mib": self.peak_rss / 2**20,
                "tree_processes": self.max_processes, "java_xmx": " ".join(self.java_args),
                "peak_roles_mib": {k: round(v / 2**20) for k, v in self.peak_roles.items()},
                "peak_rss_by_role_mib": {k: round(v / 2**20) for k, v in self.peak_role_rss.items()}}


PR_SET_CHILD_SUBREAPER = 36


def become_subreaper() -> bool:
    """Make this process the reaper of its orphaned descendants (Linux ``prctl``); False where unsupported.

    A PySpark driver does not wait for the JVM it launched: the JVM outlives it by a moment and is
    reparented to init, so its CPU time never reaches ``os.wait4`` of the command. As a subreaper
    this process inherits such orphans, reaps them and so counts their CPU (:func:`reap_orphans`).
    """
    import ctypes

    try:
        libc = ctypes.CDLL(None, use_errno=True)
        return libc.prctl(PR_SET_CHILD_SUBREAPER, 1, 0, 0, 0) == 0
    except (OSError, AttributeError):
        return False


def _children() -> set[int]:
    import psutil

    return {c.pid for c in psutil.Process().children()}


def reap_orphans(earlier: set[int], timeout: float = 120.0) -> tuple[float, bool]:
    """Wait for every child of this process not in ``earlier`` (the orphans a command left behind).

    Returns their CPU seconds (user + sys, with what they reaped) and whether all ended in time;
    children this process had before (``earlier``) are left to whoever started them.
    """
    cpu, deadline = 0.0, time.monotonic() + timeout
    while True:
        left = _children() - earlier
        if not left:
            return cpu, True
        for pid in left:
            try:
                done, _, usage = os.wait4(pid, os.WNOHANG)
            except ChildProcessError:
                continue
            if done:
                cpu += usage.ru_utime + usage.ru_stime
        if time.monotonic() > deadline:
            return cpu, False
        time.sleep(0.05)


def run_child(argv: list[str], *, env: dict | None = None, timeout: float = 3600, tree: bool = False) -> dict:
    """Run ``argv`` as a child; wall seconds, CPU seconds, peak RSS (MiB) from wait4, and its JSON stdout.

    ``cpu`` is the user + system time of the whole process tree: the child with what it reaped, plus
    (this process being a subreaper, :func:`become_subreaper`) every orphan it left, such as the JVM
    of a PySpark driver (``cpu_orphans``: that part; ``cpu_complete``: False if an orphan outlived the
    wait). With ``tree=True`` also the peak memory of the child and all its descendants
    (:class:`ProcessTreeMemory`: ``tree_pss_mib``, ``tree_rss_mib``, ``tree_processes``,
    ``peak_rss_by_role_mib``). The 1-minute load average before and after is ``load``.
    A failed child raises ``SystemExit`` whose last line is the child's last line of stderr followed
    by its exit code, CPU seconds and peak memory.
    """
    subreaper, earlier = become_subreaper(), _children()
    load_before = os.getloadavg()[0]
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    started = time.perf_counter()
    with tempfile.TemporaryFile("w+") as out, tempfile.TemporaryFile("w+") as err:
        proc = subprocess.Popen(argv, stdout=out, stderr=err, env=env, text=True)
        sampler = ProcessTreeMemory(proc.pid) if tree else None
        _, status, usage = os.wait4(proc.pid, 0)
        wall = time.perf_counter() - started
        orphans_cpu, complete = reap_orphans(earlier) if subreaper else (0.0, False)
        sampled = sampler.stop() if sampler else {}
        proc.returncode = os.waitstatus_to_exitcode(status)
        out.seek(0), err.seek(0)
        stdout, stderr = out.read(), err.read()
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    result = {"wall": wall, "cpu": cpu, "cpu_orphans": orphans_cpu, "cpu_complete": complete,
              "rss_mib": usage.ru_maxrss / 1024.0, "load": (load_before, os.getloadavg()[0]),
              "stdout": stdout, "stderr": stderr, **sampled}
    if proc.returncode != 0:
        lines = [line for line in stderr.strip().splitlines() if line.strip()] or ["(no stderr)"]
        memory = f"; tree peak PSS {result['tree_pss_mib']:.0f} MiB" if tree else ""
        raise SystemExit(f"{' '.join(argv[:4])}... exited {proc.returncode}: {stderr[-2000:]}\n"
                         f"{lines[-1].strip()[:240]} [exit {proc.returncode} after {wall:.0f} s, CPU {cpu:.1f} s, "
                         f"peak RSS {result['rss_mib']:.0f} MiB{memory}]")
    try:  # a child's one JSON line, or a command's whole JSON output
        result.update(json.loads(stdout.strip().splitlines()[-1]))
    except (ValueError, IndexError):
        try:
            result.update(json.loads(stdout))
        except ValueError:
            pass
    return result


def spark_settings(pairs: list[str]) -> dict[str, str]:
    """:data:`SPARK_CONF` updated by ``KEY=VALUE`` pairs."""
    settings = dict(SPARK_CONF)
    for pair in pairs:
        key, sep, value = pair.partition("=")
        if not sep:
            raise SystemExit(f"--spark-conf {pair!r}: expected KEY=VALUE")
        settings[key.strip()] = value.strip()
    return settings


def spark_environment(folder: Path, pairs: list[str]) -> dict[str, str]:
    """The environment of a Spark child: ``SPARK_CONF_DIR`` holding a ``spark-defaults.conf``.

    ``counterbid estimate --engine spark`` starts its session with its own few settings; anything
    else (the driver's heap above all, which must be known before the JVM starts) comes, as for any
    Spark application, from ``$SPARK_CONF_DIR/spark-defaults.conf``, read by Spark's launcher.
    """
    conf_dir = folder / "spark-conf"
    conf_dir.mkdir(exist_ok=True)
    (conf_dir / "spark-defaults.conf").write_text(
        "".join(f"{k} {v}\n" for k, v in spark_settings(pairs).items()))
    return {**os.environ, "SPARK_CONF_DIR": str(conf_dir)}


def make_data(folder: Path, millions: int, spec_path: Path, me: list[str]) -> Path:
    """Simulate once per size, in a child, so this parent stays small.

    (A child's ``ru_maxrss`` counts the pages it shares with the parent between fork and exec.)
    """
    target = folder / f"bids_{millions}M.parquet"
    if not target.exists():
        r = run_child([*me, "--child", "simulate", str(target), str(spec_path)])
        print(f"simulated {r['n']} bids in {r['work']:.1f}s -> {target}", file=sys.stderr, flush=True)
    return target


def _simulate(target: Path, spec_path: str) -> dict:
    import scipy.stats as st

    from counterbid.estimators import load_experiment, simulate_experiment

    millions = int(re.search(r"_(\d+)M", target.name).group(1))
    exp = load_experiment(spec_path)
    t0 = time.perf_counter()
    frame = simulate_experiment(st.lognorm(0.5, scale=0.8), exp, n_bidders=N_BIDDERS,
                                n_auctions=millions * 1_000_000 // N_BIDDERS, rng=millions)
    frame[COLUMNS].to_parquet(target, index=False)
    return {"work": time.perf_counter() - t0, "n": len(frame)}


def text_ids(source: Path, me: list[str]) -> Path:
    """A copy of ``source`` with its auction and bidder ids as distinct strings (many distinct values).

    Written by a child, as :func:`make_data` does: ``subprocess`` starts children with ``vfork``,
    and a child's ``ru_maxrss`` then starts at this parent's own peak RSS (Linux carries the
    high-water mark of the memory the child borrowed until ``exec``), so a parent that once held a
    10M-row table would set the floor of every later row's peak RSS.
    """
    target = source.with_name(source.stem + "_text.parquet")
    if not target.exists():
        run_child([*me, "--child", "text_ids", str(source), "-"])
    return target


def _write_text_ids(source: Path) -> dict:
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    target = source.with_name(source.stem + "_text.parquet")
    table = pq.read_table(source)
    auction, bidder = table.column("auction_id"), table.column("bidder_id")
    text = {"auction_id": pc.binary_join_element_wise("qa-", pc.cast(auction, pa.string()), ""),
            "bidder_id": pc.binary_join_element_wise("qb-", pc.cast(bidder, pa.string()), "-",
                                                     pc.cast(pc.bit_wise_and(auction, 1023), pa.string()), "")}
    for name, column in text.items():
        table = table.set_column(table.schema.get_field_index(name), name, column)
    partial = target.with_name(target.name + ".partial")
    pq.write_table(table, partial)
    partial.rename(target)
    return {"work": 0.0}


def dag_day(folder: Path, bids_1m: Path, spec_path: Path) -> dict:
    """One ``counterbid backfill`` day (dag.test) on the 1M-bid file as the day's partition."""
    lake = folder / "lake" / "ds=2026-03-02"
    lake.mkdir(parents=True, exist_ok=True)
    if not (lake / "bench.parquet").exists():
        os.link(bids_1m, lake / "bench.parquet")
    results = folder / "dag_results.duckdb"
    results.unlink(missing_ok=True)
    exe = Path(sys.executable).with_name("counterbid")
    env = {k: v for k, v in os.environ.items() if not k.startswith(("AIRFLOW", "COUNTERBID_"))}
    r = run_child([str(exe), "backfill", "--lake", str(folder / "lake"), "--experiments", str(spec_path),
                   "--results", str(results), "--start", "2026-03-02", "--end", "2026-03-02"], env=env)
    m = re.search(r"2026-03-02 (\w+)\s+([\d.]+)s\s+\((.*)\)", r["stderr"])
    r["state"], r["dag_seconds"], r["steps"] = (m.group(1), float(m.group(2)), m.group(3)) if m else ("?", float("nan"), "")
    return r


#: How the issue table's columns are measured.
ISSUE_TABLE_NOTE = ("CPU s: user + system seconds of every process of the command's tree (the command and what it "
                    "reaped, os.wait4, plus the orphans this benchmark reaps as a subreaper: the JVM of the Spark "
                    "rows; 'JVM CPU s' is that orphaned part; on a shared machine wall time waits for cores, CPU time "
                    "does not); peak memory: the process tree's peak PSS (sampled every 50 ms: the Spark engine is a "
                    "driver, a JVM and Python workers), and the peak RSS of the driver (the command's own process), "
                    "of the JVM and of the Python workers (summed), each its own peak; bids/s per core: bids / wall / "
                    "cores, the local engine counted as one core, Spark as its master's task threads with the "
                    "session start (row 'Spark session start' in the notes) taken out of its wall time; bids per "
                    "CPU s: bids / CPU s (whole tree, session start included); load: 1-minute load average before "
                    "and after the row.")
ISSUE_TABLE_HEAD = ["| bids | ids | engine | shards | wall s | wall / floor | CPU s | CPU / floor | JVM CPU s | "
                    "peak PSS MiB | driver peak RSS MiB | JVM peak RSS MiB | Python workers peak RSS MiB | bids/s per core | bids per CPU s | load |",
                    "|---:|---|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---|"]


def _spark_cores(master: str) -> int:
    m = re.fullmatch(r"local\[(\d+)\]", master)
    return int(m.group(1)) if m else (os.cpu_count() or 1)


def _issue_row(millions: int, kind: str, r: dict | None, floor: dict | None, spark_start: dict | None,
               *, failed: str = "") -> str:
    """One row of the issue's table: size, ids, engine, wall, ratio to the floor, memory, bids/s per core."""
    ids = "string" if kind.endswith("_text") else "integer"
    spark = kind.startswith("cli_spark")
    engine = f"spark {SPARK_MASTER_IN_USE[0]}" if spark else "local" if kind != "floor" else "floor: DuckDB + np.sort"
    if r is None:
        return f"| {millions}M | {ids} | {engine} | – | failed: {failed} |" + " – |" * 11
    ratio = r["wall"] / floor["wall"] if floor else float("nan")
    if spark:
        busy = r["wall"] - (spark_start["wall"] if spark_start else 0.0)
        per_core = millions * 1e6 / busy / _spark_cores(SPARK_MASTER_IN_USE[0])
    else:
        per_core = millions * 1e6 / r["wall"]
    cpu_ratio = r["cpu"] / floor["cpu"] if floor else float("nan")
    by_role = r.get("peak_rss_by_role_mib", {})
    jvm_rss = f"{by_role.get('jvm', 0):.0f} | {by_role.get('workers', 0):.0f}" if spark else "– | –"
    orphans = f"{r.get('cpu_orphans', 0.0):.2f}" + ("" if r.get("cpu_complete", True) else " (incomplete)")
    load = r.get("load", (float("nan"), float("nan")))
    return (f"| {millions}M | {ids} | {engine} | {r.get('shards', '–')} | {r['wall']:.2f} | {ratio:.2f} | "
            f"{r['cpu']:.2f} | {cpu_ratio:.2f} | {orphans if spark else '–'} | {r['tree_pss_mib']:.0f} | "
            f"{by_role.get('driver', 0):.0f} | {jvm_rss} | {per_core:,.0f} | "
            f"{millions * 1e6 / r['cpu']:,.0f} | {load[0]:.1f}→{load[1]:.1f} |")


#: The master of this run's Spark rows (set by ``main``).
SPARK_MASTER_IN_USE = [SPARK_MASTER]


def repeated(argv: list[str], times: int, **options) -> dict:
    """Median wall, work and peak memory of ``times`` runs of one child (the other fields of the last)."""
    runs = [run_child(argv, **options) for _ in range(times)]
    out = dict(runs[-1])
    for field in ("wall", "cpu", "cpu_orphans", "work", "rss_mib", "tree_pss_mib", "tree_rss_mib"):
        if field not in out:
            continue
        values = [r.get(field, float("nan")) for r in runs]
        out[field] = statistics.median(values) if all(v == v for v in values) else float("nan")
    if "tree_pss_mib" in out:  # the composition of the median run's peak
        out["peak_roles_mib"] = sorted(runs, key=lambda r: r["tree_pss_mib"])[(len(runs) - 1) // 2]["peak_roles_mib"]
    out["walls"] = [round(r["wall"], 2) for r in runs]
    return out


LABELS = {"floor": "(a) floor: DuckDB read bid + np.sort", "input": "(a2) DuckDB read of the 5 columns used + np.sort",
          "cli": "(b) counterbid estimate (CLI process)", "cli_text": "(b2) counterbid estimate, string ids",
          "cli_spark": "(b3) counterbid estimate --engine spark, local[2]",
          "cli_spark_text": "(b4) counterbid estimate --engine spark, local[2], string ids",
          "estimate": "(b') read_bids + estimate_arms",
          "sql_realized": "(c) realized per-arm average (DuckDB)", "pandas": "(d) plain-pandas peer"}


#: Rows left out unless asked for: the engines' table of the issue is floor, cli, cli_text, cli_spark
#: and cli_spark_text at 1M, 10M and 30M bids (the plain-pandas peer alone takes minutes at 30M).
DEFAULT_SKIP = "input,estimate,sql_realized,pandas"
ROW_KINDS = ("floor", "input", "cli", "cli_text", "cli_spark", "cli_spark_text", "estimate", "sql_realized", "pandas")


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--sizes", default="1,10,30", help="bid counts in millions (default 1,10,30)")
    p.add_argument("--repeat", type=int, default=3, help="runs per row; medians are reported (default 3)")
    p.add_argument("--data", help="folder for the simulated Parquet files (kept; default: temporary)")
    p.add_argument("--out", help="also write the markdown table here")
    p.add_argument("--skip", default=DEFAULT_SKIP,
                   help="comma-separated rows to skip (floor,input,cli,cli_text,cli_spark,cli_spark_text,estimate,"
                        f"sql_realized,pandas,dag,compare; default {DEFAULT_SKIP}; '' runs every row)")
    p.add_argument("--spark-master", default=SPARK_MASTER, help=f"master of the Spark rows (default {SPARK_MASTER})")
    p.add_argument("--spark-conf", action="append", default=[], metavar="KEY=VALUE",
                   help="a Spark setting of the Spark rows, written to their spark-defaults.conf (repeatable; default "
                        + ", ".join(f"{k}={v}" for k, v in SPARK_CONF.items()) + ")")
    p.add_argument("--compare-millions", type=int, default=2, help="bids (millions) of the engine comparison (default 2)")
    p.add_argument("--child", nargs=3, metavar=("KIND", "PATH", "SPEC"), help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.child:
        print(json.dumps(child(*args.child)))
        return 0
    skip = set(filter(None, args.skip.split(",")))
    SPARK_MASTER_IN_USE[0] = args.spark_master
    folder = Path(args.data) if args.data else Path(tempfile.mkdtemp(prefix="counterbid-bench-"))
    folder.mkdir(parents=True, exist_ok=True)
    spec_path = folder / "bench.yaml"
    spec_path.write_text(SPEC)
    me = [sys.executable, str(Path(__file__).resolve())]
    exe = str(Path(sys.executable).with_name("counterbid"))
    lines = ["| bids | row | wall s | work s | peak RSS MiB | wall / (a) | work / (a) | RSS / bid column | "
             "RSS - imports / bid column |",
             "|---:|---|---:|---:|---:|---:|---:|---:|---:|"]
    base = repeated([*me, "--child", "baseline", "-", "-"], args.repeat)
    floor_base = repeated([*me, "--child", "floor_baseline", "-", "-"], args.repeat)
    touch = repeated([*me, "--child", "touch", "-", "-"], args.repeat)
    notes = [f"interpreter + imports (numpy, pandas, scipy, pyarrow, duckdb, counterbid): "
             f"{base['wall']:.2f} s, {base['rss_mib']:.0f} MiB peak RSS; DuckDB + numpy only: "
             f"{floor_base['wall']:.2f} s, {floor_base['rss_mib']:.0f} MiB",
             f"faulting in 400 MiB of fresh memory: {touch['work']:.2f} s "
             f"({touch['work'] / 4:.3f} s per 100 MiB)",
             f"load average at the start: {os.getloadavg()[0]:.2f}; medians of {args.repeat} runs"]
    first_file = None
    spark_env = spark_environment(folder, args.spark_conf)
    issue_rows: list[str] = []
    spark_start = None
    if not {"cli_spark", "cli_spark_text"} <= skip:
        spark_start = repeated([*me, "--child", "spark_start", args.spark_master, "-"], args.repeat, env=spark_env)
        notes.append(f"Spark session start ({args.spark_master}: JVM, session, first job), nothing read: "
                     f"{spark_start['work']:.2f} s after imports, {spark_start['wall']:.2f} s wall; subtracted from "
                     "the Spark rows' wall time in their per-core throughput")
    engine_lines = ["| bids | engine | shards | wall s | peak RSS of the command's process MiB | "
                    "peak PSS of the process tree MiB | peak RSS summed over the tree MiB | processes |",
                    "|---:|---|---:|---:|---:|---:|---:|---:|"]
    for millions in [int(s) for s in args.sizes.split(",")]:
        path = make_data(folder, millions, spec_path, me)
        first_file = first_file or path
        column_mib = millions * 1e6 * 8 / 2**20
        rows = {}
        for kind in ROW_KINDS:
            if kind in skip:
                continue
            options = {}
            if kind.startswith("cli"):
                bids = text_ids(path, me) if kind.endswith("_text") else path
                argv = [exe, "estimate", "--bids", str(bids), "--experiment", str(spec_path), "--format", "json"]
                options["tree"] = True
                if kind.startswith("cli_spark"):
                    argv += ["--engine", "spark", "--spark-master", args.spark_master]
                    options["env"] = spark_env
            else:
                argv = [*me, "--child", kind, str(path), str(spec_path)]
                options["tree"] = kind == "floor"  # the floor's row in the issue table has the same columns
            try:
                r = repeated(argv, 1 if kind == "pandas" else args.repeat, **options)
            except SystemExit as exc:  # a failed row is reported, not the end of the benchmark
                failed = str(exc).strip().splitlines()[-1][:300] if str(exc).strip() else "failed"
                issue_rows.append(_issue_row(millions, kind, None, rows.get("floor"), spark_start, failed=failed))
                print(f"{millions}M {kind}: FAILED {exc}", file=sys.stderr, flush=True)
                continue
            if kind.startswith("cli"):
                r["work"] = float("nan")
            if kind.startswith("cli") or kind == "floor":
                issue_rows.append(_issue_row(millions, kind, r, r if kind == "floor" else rows.get("floor"), spark_start))
            if kind in ("cli", "cli_spark"):
                engine = "local (default shards)" if kind == "cli" else f"spark {args.spark_master} ({r['java_xmx']})"
                roles = ", ".join(f"{k} {v}" for k, v in sorted(r["peak_roles_mib"].items()))
                engine_lines.append(f"| {millions}M | {engine} | {r.get('shards', '?')} | {r['wall']:.2f} | "
                                    f"{r['rss_mib']:.0f} | {r['tree_pss_mib']:.0f} ({roles}) | "
                                    f"{r['tree_rss_mib']:.0f} | {r['tree_processes']} |")
            rows[kind] = r
            print(f"{millions}M {kind}: wall {r['wall']:.2f}s {r['walls']} cpu {r['cpu']:.2f}s "
                  f"work {r.get('work', float('nan')):.2f}s "
                  f"rss {r['rss_mib']:.0f} MiB {({k: v for k, v in r.items() if k in ('read', 'sort', 'estimate')})}",
                  file=sys.stderr, flush=True)
        floor = rows.get("floor")
        for kind, r in rows.items():
            if kind.startswith("cli_spark"):  # its process is the Python driver alone: the engines table has the tree
                continue
            ratio_wall = r["wall"] / floor["wall"] if floor else float("nan")
            ratio_work = r["work"] / floor["work"] if floor and r["work"] == r["work"] else float("nan")
            cells = [f"{v:.2f}" if v == v else "–" for v in (r["wall"], r["work"])]
            ratios = [f"{v:.2f}" if v == v else "–" for v in (ratio_wall, ratio_work)]
            imports = floor_base if kind in ("floor", "input") else base
            lines.append(f"| {millions}M | {LABELS[kind]} | {cells[0]} | {cells[1]} | {r['rss_mib']:.0f} | "
                         f"{ratios[0]} | {ratios[1]} | {r['rss_mib'] / column_mib:.1f} | "
                         f"{(r['rss_mib'] - imports['rss_mib']) / column_mib:.1f} |")
    if "dag" not in skip and first_file is not None and first_file.name == "bids_1M.parquet":
        d = dag_day(folder, first_file, spec_path)
        notes.append(f"one-day DAG run (counterbid backfill, dag.test) on 1M bids: {d['state']} in {d['dag_seconds']:.1f} s "
                     f"({d['steps']}); process wall {d['wall']:.1f} s incl. Airflow metadata migration, "
                     f"peak RSS {d['rss_mib']:.0f} MiB")
    issue_table = [f"`counterbid estimate --format json` against the floor (a), same run; {ISSUE_TABLE_NOTE}", "",
                   *ISSUE_TABLE_HEAD, *issue_rows, ""]
    sections = issue_table + lines + [""] + [f"* {n}" for n in notes]
    if len(engine_lines) > 2:
        sections += ["", f"Engines: `counterbid estimate --format json`, local engine against `--engine spark "
                         f"--spark-master {args.spark_master}` (Spark settings: "
                         f"{', '.join(f'{k}={v}' for k, v in spark_settings(args.spark_conf).items()) or 'defaults'}); medians of "
                         f"{args.repeat} runs; the process tree's memory sampled every 50 ms (see ProcessTreeMemory).",
                     "", *engine_lines]
    if "compare" not in skip:
        compared = run_child([sys.executable, str(HERE / "compare_engines.py"), "--data", str(folder),
                              "--millions", str(args.compare_millions), "--spark-master", args.spark_master,
                              "--exit-zero"],
                             env=spark_env)
        sections += ["", compared["stdout"].rstrip()]
    text = "\n".join(sections) + "\n"
    print(text)
    if args.out:
        Path(args.out).write_text(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
