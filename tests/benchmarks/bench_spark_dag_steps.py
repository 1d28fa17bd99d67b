"""The daily DAG's steps on each engine, step by step: CPU time and peak RSS of the worker's Python process (not a test).

Writes (or keeps) the lake day of ``bench_dag_steps.py`` (``--millions`` million bids, text ids,
three arms), then runs each step of one (experiment, day) in a child process of its own, as an
Airflow worker runs a task: ``--engine local`` (DuckDB staging, the local checks, the estimate
of every staged shard in the step) or ``--engine spark`` (the Spark load, validate and estimate
steps on a ``local[2]`` session built in the child, as the provider's operator builds it; the write
step is the same). Per step: the worker process's own CPU seconds (user + sys) and peak RSS
(``ru_maxrss`` of the Python process), and for Spark the JVM's and its Python workers' CPU seconds
during the step (the session's start shown apart) and largest peak RSS (from ``/proc`` before the
session stops), and the staged bytes of the day
(bid files on the worker). The table is headed by the machine's load average before and after.

Usage: python tests/benchmarks/bench_spark_dag_steps.py --data DIR [--millions 3] [--engine local|spark|both]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_dag_steps import DAY, SPEC, StepFailed, last_error_line, write_lake  # noqa: E402  (the same simulated day)

STEPS = ("load", "validate", "estimate", "write")
#: Marks the child's answer line among whatever else it prints.
ANSWER = "step-answer "
#: The session the Spark steps run on: what an Airflow connection of type spark would carry as extras.
SPARK_CONF = {"spark.master": "local[2]", "spark.driver.memory": "2g", "spark.sql.shuffle.partitions": "8",
              "spark.ui.enabled": "false", "spark.ui.showConsoleProgress": "false"}


def _descendants() -> list[int]:
    """Process ids of this process's descendants (the JVM and the Python workers it started)."""
    parents: dict[int, int] = {}
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                with open(f"/proc/{entry}/stat") as fh:
                    parents[int(entry)] = int(fh.read().rsplit(")", 1)[1].split()[1])
            except (OSError, ValueError, IndexError):
                continue
    found, frontier = [], [os.getpid()]
    while frontier:
        pid = frontier.pop()
        kids = [p for p, pp in parents.items() if pp == pid]
        found += kids
        frontier += kids
    return found


def _usage(pids: list[int]) -> tuple[float, float]:
    """CPU seconds (user + sys) of ``pids`` together, and the largest peak RSS among them (MiB).

    Each process's own time and that of the children it already reaped (``cutime``, ``cstime``: the
    Python workers that ended under the PySpark daemon): a living process's reaped children are no
    longer among ``pids``, so nothing is counted twice.
    """
    ticks, cpu, peak = os.sysconf("SC_CLK_TCK"), 0.0, 0.0
    for pid in pids:
        try:
            with open(f"/proc/{pid}/stat") as fh:
                fields = fh.read().rsplit(")", 1)[1].split()
            cpu += sum(int(f) for f in fields[11:15]) / ticks  # utime, stime, cutime, cstime
            with open(f"/proc/{pid}/status") as fh:
                hwm = next((line for line in fh if line.startswith("VmHWM:")), "VmHWM: 0 kB")
            peak = max(peak, int(hwm.split()[1]) / 1024)
        except (OSError, ValueError, IndexError):
            continue
    return cpu, peak


def _staged_bytes(staging: Path) -> int:
    return sum(p.stat().st_size for p in staging.glob("*/ds=*/day/**/*.parquet"))


def one_step(step: str, engine: str, lake: Path, spec: Path, work: Path) -> dict:
    """One step in this process; the step alone (imports and session start excluded)."""
    from counterbid.estimators import load_experiment
    from counterbid.operators import partition
    from counterbid.operators.hooks import ResultsHook
    from counterbid.operators.lake_hook import LakeHook
    from counterbid.operators.staging import StagedPartition

    exp, hook, staging = load_experiment(spec), ResultsHook(database=str(work / "results.duckdb")), work / "staging"
    staged = StagedPartition.at(staging, exp.id, DAY)
    spark = None
    if engine == "spark" and step != "write":
        os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
        import pyspark  # noqa: F401  (before Great Expectations, as in the task's own process)
        from pyspark.sql import SparkSession

        builder = SparkSession.builder.appName(f"bench-{step}")
        for key, value in SPARK_CONF.items():
            builder = builder.config(key, value)
        spark = builder.getOrCreate()
        from counterbid.operators import spark_checks  # noqa: F401
    jvm_start = _usage(_descendants())[0] if spark is not None else 0.0  # the session's start, left out
    t0, c0 = time.perf_counter(), time.process_time()
    if step == "load" and spark is not None:
        from counterbid.operators.spark_checks import record_spark_day

        record_spark_day(spark, LakeHook(), lake_root=str(lake), experiment=exp, ds=DAY, staging_root=str(staging))
    elif step == "load":
        partition.stage_partition(LakeHook(), lake_root=lake, experiment=exp, ds=DAY, staging_root=staging)
    elif step == "validate":
        if spark is not None:
            from counterbid.operators.spark_checks import run_spark_partition_checks

            results = run_spark_partition_checks(spark, hook, lake_root=str(lake), experiment=exp, staged=staged, ds=DAY)
        else:
            results = partition.run_partition_checks(hook, LakeHook(), experiment=exp, staged=staged, ds=DAY)
        partition.record_checks(staged, results)
        partition.store_checks(hook, results, experiment_id=exp.id, ds=DAY, run_id="bench")
        failed = [r.check for r in results if not r.passed and r.severity == "error"]
        if failed:
            raise SystemExit(f"validate failed: {failed}")
    elif step == "estimate":
        if spark is not None:
            from counterbid.operators.spark_checks import changed_files, read_spark_day
            from counterbid.readers.spark_lake_day import lake_day_files

            found = lake_day_files(spark, str(lake), experiment=exp, ds=DAY).fingerprint()
            assert changed_files(read_spark_day(staged)["files"], found) is None
        partition.estimate_partition(hook, experiment=exp, ds=DAY, staging_root=staging, run_id="bench",
                                     confidence_level=0.95, cluster="auto", spark=spark,
                                     lake_root=str(lake) if spark is not None else None)
    else:
        staged_bytes = _staged_bytes(staging)
        partition.write_partition(hook, experiment_id=exp.id, ds=DAY, staging_root=staging)
    out = {"step": step, "cpu": time.process_time() - c0, "wall": time.perf_counter() - t0,
           "staged_mib": (_staged_bytes(staging) if step != "write" else staged_bytes) / 2**20}
    if spark is not None:
        total, out["jvm_peak_mib"] = _usage(_descendants())
        out["jvm_cpu"], out["jvm_start_cpu"] = total - jvm_start, jvm_start
        spark.stop()
    out["rss_mib"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return out


def _child(argv: list[str]) -> tuple[dict, float, float]:
    """Run a step child; its answer, and its own CPU seconds (``os.wait4``, waited-for children included) and wall."""
    import tempfile

    t0 = time.perf_counter()
    with tempfile.TemporaryFile("w+") as err:
        proc = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=err, text=True)
        out = proc.stdout.read()
        _, status, usage = os.wait4(proc.pid, 0)
        err.seek(0)
        stderr = err.read()
    sys.stderr.write(stderr)  # the steps' own log lines
    sys.stderr.flush()
    code = os.waitstatus_to_exitcode(status)
    if code != 0:
        raise StepFailed(argv[2:], code, last_error_line(stderr), usage.ru_utime + usage.ru_stime,
                         time.perf_counter() - t0, usage.ru_maxrss / 1024)
    answer = json.loads(next(line for line in out.splitlines() if line.startswith(ANSWER))[len(ANSWER):])
    return answer, usage.ru_utime + usage.ru_stime, time.perf_counter() - t0


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--data", required=True, type=Path)
    p.add_argument("--millions", type=int, default=3)
    p.add_argument("--engine", choices=("local", "spark", "both"), default="both")
    p.add_argument("--step", help=argparse.SUPPRESS)  # a child
    args = p.parse_args(argv)
    spec, lake = args.data / "spec.yaml", args.data / f"lake_{args.millions}M"
    if args.step:
        import logging

        # the steps' own lines (the Spark validate step logs where its time goes) to stderr
        logging.basicConfig(level=logging.INFO, stream=sys.stderr, format="%(name)s: %(message)s")
        engine = args.engine
        answer = one_step(args.step, engine, lake, spec, args.data / f"run_{args.millions}M_{engine}_steps")
        print(ANSWER + json.dumps(answer), flush=True)
        return 0
    args.data.mkdir(parents=True, exist_ok=True)
    spec.write_text(SPEC)
    write_lake(lake, args.millions, spec)
    engines = ("local", "spark") if args.engine == "both" else (args.engine,)
    print(f"{args.millions}M bids; load average before: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    print("| engine | step | worker CPU s | worker peak RSS MiB | JVM + Python workers CPU s | their largest peak RSS MiB "
          "| wall s (step) | child CPU s with imports | bids staged on the worker MiB |")
    print("| --- | --- | ---: | ---: | ---: | ---: | ---: | ---: | ---: |")
    for engine in engines:
        work = args.data / f"run_{args.millions}M_{engine}_steps"
        shutil.rmtree(work, ignore_errors=True)
        work.mkdir()
        for step in STEPS:
            try:
                got, child_cpu, _ = _child([sys.executable, __file__, "--data", str(args.data), "--millions",
                                            str(args.millions), "--engine", engine, "--step", step])
            except StepFailed as failed:  # the later steps need this one: the row, then the next engine
                print(f"| {engine} | {step} FAILED (exit {failed.exit_code}) | – | {failed.rss_mib:.0f} (child) | – | – | "
                      f"{failed.wall:.2f} (child) | {failed.cpu:.2f} | {failed.last_line.replace('|', '/')} |",
                      flush=True)
                break
            jvm = ((f"{got['jvm_cpu']:.2f} (+{got.get('jvm_start_cpu', float('nan')):.1f} start)",
                    f"{got['jvm_peak_mib']:.0f}") if "jvm_cpu" in got else ("-", "-"))
            print(f"| {engine} | {step} | {got['cpu']:.2f} | {got['rss_mib']:.0f} | {jvm[0]} | {jvm[1]} | "
                  f"{got['wall']:.2f} | {child_cpu:.2f} | {got['staged_mib']:.1f} |", flush=True)
    print(f"load average after: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
