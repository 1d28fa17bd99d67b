"""One day through the daily DAG, step by step: wall time, CPU time and peak RSS per task (not a test).

Writes a lake day of ``--millions`` million bids with string ids (auction ``lot-<n>``, bidder
``seat-<slot>-<n // 3>``: most bidders bid in one to three auctions) of a three-arm spec, then

* ``--mode dag``: runs ``counterbid_daily`` once with ``dag.test()`` in this process (as
  ``counterbid backfill`` does), sampling this process's RSS and CPU time every 0.1 s, and cuts the
  samples at each task's start and end;
* ``--mode steps``: runs each step (load, validate, estimate, write; ``--steps`` picks some) in a
  child process of its own, as an Airflow worker does, and reports each child's peak RSS
  (``ru_maxrss``) and CPU time, the step alone and the whole child with its imports (``os.wait4``).
  ``shards`` runs the DAG's mapped ``estimate_shard`` task once per staged shard, each in a child of
  its own, and ``combine`` the estimate step that combines their pieces (as the daily DAG on the
  local engine does); ``estimate`` estimates every shard inside one step instead.

Both modes first parse the DAG file in a child process of its own, as Airflow's DAG processor and
every task's runner do, and report that child's CPU time, wall time, peak RSS and which heavy
libraries the parse loaded. The result is one step table (CPU s = user + sys), headed by the load
average of the machine before and after: timings on a shared machine are inflated, CPU seconds
less so.

Usage: python tests/benchmarks/bench_dag_steps.py --data DIR [--millions 1] [--mode dag|steps]
       [--steps load,validate] [--keep-work]
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import resource
import subprocess
import sys
import threading
import time
from pathlib import Path

DAY = dt.date(2026, 3, 2)
SPEC = """
experiments:
  - id: shelfmix
    control_arm: control
    start: 2026-03-02
    arms:
      - {name: control, share: 0.8, position_weights: [0.31, 0.17, 0.06, 0.02]}
      - {name: tall,    share: 0.1, position_weights: [0.29, 0.22, 0.15, 0.02]}
      - {name: split,   share: 0.1, position_weights: [0.29, 0.19, 0.10, 0.05, 0.02]}
"""
AUCTIONS_PER_FILE = 200_000  # 5 bidders each: 1M bids per file


def write_lake(root: Path, millions: int, spec: Path) -> None:
    """``millions`` files of 1M simulated bids each in ``root/ds=DAY``, ids as text (kept between runs)."""
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.parquet as pq
    import scipy.stats as st

    from counterbid.estimators import load_experiment, simulate_experiment

    folder = root / f"ds={DAY}"
    folder.mkdir(parents=True, exist_ok=True)
    exp = load_experiment(spec)
    for k in range(millions):
        target = folder / f"part-{k:03d}.parquet"
        if target.exists():
            continue
        frame = simulate_experiment(st.lognorm(0.5, scale=0.8), exp, n_bidders=5, n_auctions=AUCTIONS_PER_FILE,
                                    rng=1000 + k)
        t = pa.Table.from_pandas(frame[["experiment_id", "auction_id", "bidder_id", "arm", "bid", "position"]],
                                 preserve_index=False)
        auction = pc.add(pc.cast(t["auction_id"], pa.int64()), k * AUCTIONS_PER_FILE)
        bidder = pc.binary_join_element_wise("seat-", pc.cast(t["bidder_id"], pa.string()), "-",
                                             pc.cast(pc.divide(auction, 3), pa.string()), "")
        t = t.set_column(t.schema.get_field_index("auction_id"), "auction_id",
                         pc.binary_join_element_wise("lot-", pc.cast(auction, pa.string()), ""))
        t = t.set_column(t.schema.get_field_index("bidder_id"), "bidder_id", bidder)
        pq.write_table(t, target.with_suffix(".partial"))
        target.with_suffix(".partial").rename(target)


#: Libraries whose import is a large share of a task's fixed cost: which ones a parse of the DAG file loads.
HEAVY_MODULES = ("scipy", "pandas", "pyarrow", "duckdb", "great_expectations", "sqlalchemy", "pyspark")
PARSE = """
import resource, sys, time
t0, c0 = time.perf_counter(), time.process_time()
import counterbid.dags_example.daily
heavy = [m for m in {heavy!r} if m in sys.modules]
print(f"{{time.perf_counter() - t0:.3f}} {{time.process_time() - c0:.3f}} {{','.join(heavy) or '-'}}")
"""


def _row(step: str, cpu: float, wall: float, rss_mib: float, note: str = "") -> str:
    return f"| {step:<28} | {cpu:7.2f} | {wall:7.2f} | {rss_mib:7.0f} | {note} |"


def _table_head() -> list[str]:
    return ["| step | CPU s | wall s | peak RSS MiB | note |", "| --- | ---: | ---: | ---: | --- |"]


def _loadavg() -> str:
    return " ".join(f"{x:.2f}" for x in os.getloadavg())


class StepFailed(SystemExit):
    """A child that exited non-zero: its last line of stderr, exit code, CPU seconds, wall and peak RSS."""

    def __init__(self, argv: list[str], code: int, last_line: str, cpu: float, wall: float, rss_mib: float):
        self.exit_code, self.last_line, self.cpu, self.wall, self.rss_mib = code, last_line, cpu, wall, rss_mib
        super().__init__(f"{argv[:3]}...: exit {code}: {last_line}")


def last_error_line(stderr: str) -> str:
    """The last non-blank line of a child's stderr (a traceback's last line names the error)."""
    lines = [line.strip() for line in stderr.splitlines() if line.strip()]
    return lines[-1][:300] if lines else "(no stderr)"


def _child(argv: list[str], env: dict | None = None) -> tuple[str, float, float, float]:
    """Run ``argv``; its stdout, CPU seconds (user + sys, from ``os.wait4``), wall seconds and peak RSS (MiB).

    The child's stderr is passed on to this process's stderr; a non-zero exit raises :class:`StepFailed`.
    """
    import tempfile

    t0 = time.perf_counter()
    with tempfile.TemporaryFile("w+") as err:
        proc = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=err, env=env, text=True)
        out = proc.stdout.read()
        _, status, usage = os.wait4(proc.pid, 0)
        err.seek(0)
        stderr = err.read()
    sys.stderr.write(stderr)
    sys.stderr.flush()
    proc.returncode = os.waitstatus_to_exitcode(status)
    cpu, wall, rss = usage.ru_utime + usage.ru_stime, time.perf_counter() - t0, usage.ru_maxrss / 1024
    if proc.returncode != 0:
        raise StepFailed(argv, proc.returncode, last_error_line(stderr), cpu, wall, rss)
    return out, cpu, wall, rss


def parse_row(env: dict | None = None) -> str:
    """The DAG file parsed in a fresh interpreter (``env``, default this one's): one table row."""
    out, cpu, wall, rss = _child([sys.executable, "-c", PARSE.format(heavy=HEAVY_MODULES)], env=env or dict(os.environ))
    _, import_cpu, heavy = out.split()[-3:]
    return _row("parse DAG file (child)", cpu, wall, rss,
                f"import alone {float(import_cpu):.2f}s CPU; loads {heavy}")


def _rss() -> int:
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


def through_dag(lake: Path, spec: Path, work: Path) -> None:
    from counterbid.cli import backfill as bf

    samples: list[tuple[float, int, float]] = []
    loaded: list[tuple[float, frozenset]] = []  # names in sys.modules, sampled: what each task imported

    def sample() -> None:
        while True:
            samples.append((time.time(), _rss(), time.process_time()))
            loaded.append((samples[-1][0], frozenset(sys.modules)))
            time.sleep(0.1)

    threading.Thread(target=sample, daemon=True).start()
    conf = {"lake_root": str(lake), "spec_path": str(spec), "results_database": str(work / "results.duckdb"),
            "staging_root": str(work / "staging"), "clicks_root": ""}
    os.environ.update(bf.airflow_environment(work / "airflow", dags_folder=bf.dags_folder()))
    os.environ.update({"COUNTERBID_LAKE": conf["lake_root"], "COUNTERBID_SPEC": conf["spec_path"],
                       "COUNTERBID_RESULTS": conf["results_database"], "COUNTERBID_STAGING": conf["staging_root"],
                       "COUNTERBID_CLICKS": "", "COUNTERBID_RETRIES": "0"})
    bf.ensure_metadata()
    rows = [parse_row()]
    from airflow.configuration import conf as airflow_conf
    from airflow.dag_processing.dagbag import DagBag

    t0, c0 = time.time(), time.process_time()
    dag = DagBag(dag_folder=airflow_conf.get("core", "dags_folder")).get_dag(bf.DAG_ID)
    rows.append(_row("DagBag parse (this process)", time.process_time() - c0, time.time() - t0, _rss() / 2**20))
    t0, c0 = time.time(), time.process_time()
    run = dag.test(logical_date=dt.datetime.combine(DAY, dt.time(), tzinfo=dt.timezone.utc), run_conf=conf)
    t1, c1 = time.time(), time.process_time()
    tasks = 0.0
    for ti in sorted(run.get_task_instances(), key=lambda t: t.start_date or dt.datetime.max.replace(tzinfo=dt.timezone.utc)):
        if ti.start_date is None or ti.end_date is None:
            rows.append(_row(ti.task_id, float("nan"), float("nan"), float("nan"), f"{ti.state} (not run)"))
            continue
        a, b = ti.start_date.timestamp(), ti.end_date.timestamp()
        inside = [(r, c) for t, r, c in samples if a - 0.05 <= t <= b + 0.05]
        cpu = inside[-1][1] - inside[0][1] if inside else float("nan")
        tasks += cpu if inside else 0.0
        rows.append(_row(ti.task_id, cpu, ti.duration, max((r for r, _ in inside), default=0) / 2**20,
                         f"{ti.state}; {_imported(loaded, a, b)}"))
    rows.append(_row("between tasks (dag.test)", c1 - c0 - tasks, float("nan"), float("nan"),
                     "scheduling, XCom and state in the metadata database"))
    rows.append(_row("dag.test total", c1 - c0, t1 - t0, max(r for _, r, _ in samples) / 2**20, f"state {run.state}"))
    print("\n".join(_table_head() + rows))


def _imported(loaded: list[tuple[float, frozenset]], start: float, end: float) -> str:
    """Modules first imported between ``start`` and ``end``, counted by top-level package (the largest three)."""
    before = [m for t, m in loaded if t <= start]
    after = [m for t, m in loaded if t <= end + 0.1]
    if not before or not after:
        return "imports unknown"
    new = after[-1] - before[-1]
    by_top: dict[str, int] = {}
    for name in new:
        by_top[name.split(".")[0]] = by_top.get(name.split(".")[0], 0) + 1
    top = sorted(by_top.items(), key=lambda kv: -kv[1])[:3]
    return f"imported {len(new)} modules" + (f" ({', '.join(f'{k} {v}' for k, v in top)})" if top else "")


def one_step(step: str, lake: Path, spec: Path, work: Path) -> None:
    """One step in this process; prints ``step CPU wall peak-RSS`` (the step alone, imports excluded)."""
    from counterbid.estimators import load_experiment
    from counterbid.operators import partition
    from counterbid.operators.hooks import ResultsHook
    from counterbid.operators.lake_hook import LakeHook
    from counterbid.operators.staging import StagedPartition

    exp, hook, staging = load_experiment(spec), ResultsHook(database=str(work / "results.duckdb")), work / "staging"
    t0, c0 = time.perf_counter(), time.process_time()
    if step == "load":
        partition.stage_partition(LakeHook(), lake_root=lake, experiment=exp, ds=DAY, staging_root=staging)
    elif step == "validate":
        staged = StagedPartition.at(staging, exp.id, DAY)
        results = partition.run_partition_checks(hook, LakeHook(), experiment=exp, staged=staged, ds=DAY)
        partition.record_checks(staged, results)
        partition.store_checks(hook, results, experiment_id=exp.id, ds=DAY, run_id="bench")
    elif step == "estimate":
        partition.estimate_partition(hook, experiment=exp, ds=DAY, staging_root=staging, run_id="bench",
                                     confidence_level=0.95, cluster="auto")
    elif step.startswith("estimate_shard_"):  # one mapped shard task
        partition.estimate_partition_shard(exp, ds=DAY, staging_root=staging, shard=int(step.rsplit("_", 1)[1]),
                                           cluster="auto")
    elif step == "combine":  # the estimate step after the shard tasks: combines their stored pieces
        partition.estimate_partition(hook, experiment=exp, ds=DAY, staging_root=staging, run_id="bench",
                                     confidence_level=0.95, cluster="auto", shard_tasks=True)
    else:
        partition.write_partition(hook, experiment_id=exp.id, ds=DAY, staging_root=staging)
    print(f"{step} {time.process_time() - c0:.3f} {time.perf_counter() - t0:.3f} "
          f"{resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f}", flush=True)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--data", required=True, type=Path)
    p.add_argument("--millions", type=int, default=1)
    p.add_argument("--mode", choices=("dag", "steps"), default="dag")
    p.add_argument("--steps", default="load,validate,shards,combine,write",
                   help="with --mode steps: the steps to run, in order (comma-separated): load, validate, "
                        "shards (one child per staged shard), combine, estimate (every shard in one step), write")
    p.add_argument("--keep-work", action="store_true",
                   help="keep the run folder (staged day, results) of an earlier run: e.g. --steps validate again")
    p.add_argument("--step", help=argparse.SUPPRESS)  # a child of --mode steps
    args = p.parse_args(argv)
    spec, lake = args.data / "spec.yaml", args.data / f"lake_{args.millions}M"
    work = args.data / f"run_{args.millions}M_{args.mode}"
    if args.step:
        one_step(args.step, lake, spec, work)
        return 0
    args.data.mkdir(parents=True, exist_ok=True)
    spec.write_text(SPEC)
    write_lake(lake, args.millions, spec)
    import shutil

    if not args.keep_work:
        shutil.rmtree(work, ignore_errors=True)
    work.mkdir(exist_ok=True)
    print(f"{args.millions}M bids, mode {args.mode}; load average before: {_loadavg()}")
    if args.mode == "dag":
        through_dag(lake, spec, work)
    else:
        through_steps(args, [s.strip() for s in args.steps.split(",") if s.strip()])
    print(f"load average after: {_loadavg()}")
    return 0


def through_steps(args, steps: list[str]) -> None:
    """Each step in a child process of its own (the parse of the DAG file first): one step table."""
    from counterbid.cli import backfill as bf

    # each row as soon as its step ends: a long day's table is not lost with a step that fails
    print("\n".join(_table_head()), flush=True)
    print(parse_row(dict(os.environ, **bf.airflow_environment(args.data / "airflow_parse", dags_folder=bf.dags_folder()))),
          flush=True)
    for step in _expanded(steps, args):
        try:
            out, cpu, wall, rss = _child([sys.executable, __file__, "--data", str(args.data), "--millions",
                                          str(args.millions), "--mode", "steps", "--step", step])
        except StepFailed as failed:  # the row says what failed and at what cost; the later steps need this one
            print(_row(f"{step} FAILED (exit {failed.exit_code})", failed.cpu, failed.wall, failed.rss_mib,
                       failed.last_line.replace("|", "/")), flush=True)
            raise
        name, step_cpu, step_wall, step_rss = out.split()[-4:]
        print(_row(f"{name} (step alone)", float(step_cpu), float(step_wall), float(step_rss)), flush=True)
        print(_row(f"{name} (child with imports)", cpu, wall, rss), flush=True)


def _expanded(steps: list[str], args) -> list[str]:
    """``shards`` as one ``estimate_shard_K`` per shard the DAG maps a task over when it is reached (after
    the load step ran): none for a day staged as one shard, which the estimate step estimates itself."""
    for step in steps:
        if step != "shards":
            yield step
            continue
        from counterbid.operators.shard_step import validated_shards

        work = args.data / f"run_{args.millions}M_{args.mode}"
        yield from (f"estimate_shard_{s['shard']}" for s in validated_shards(work / "staging", DAY, ["shelfmix"]))


if __name__ == "__main__":
    sys.exit(main())
