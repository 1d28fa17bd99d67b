"""The contract suite and the auction counts of one lake day, DuckDB route against Spark route (not a test).

Writes (or reuses) a lake day of ``--millions`` million bids with string ids
(``bench_dag_steps.write_lake``), then runs, each in a child process of its own:

* ``duckdb``: :func:`counterbid.operators.contract.run_contract` on a DuckDB view of the day's
  files, and the auction counts (``sql/check_auction_counts.sql``), as the local validate step does
  on a day of one shard;
* ``spark``: :func:`counterbid.operators.spark_contract.run_contract_on_spark` on the day read by
  Spark (``local[2]``, Spark's default driver memory), and
  :func:`~counterbid.operators.spark_contract.spark_auction_counts`.

Reported per route: the child's CPU seconds (user + sys) and peak RSS from ``os.wait4`` (the
Python process: for Spark, the driver's Python side, what the Airflow worker's task process
holds; "Python peak RSS" is the child's own ``ru_maxrss``, without any process it reaped), the step alone (after imports and, for Spark, after the session started), and for Spark
the JVM's own CPU seconds and peak RSS (``/proc/<pid>``, read before it stops; in local mode the
executors live in that JVM). The load average is printed before and after.

Usage: python tests/benchmarks/bench_spark_contract.py --data DIR [--millions 1]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))
from bench_dag_steps import DAY, SPEC, _loadavg, write_lake  # noqa: E402

CHILD = r"""
import json, os, resource, sys, time
route, lake, spec = sys.argv[1:4]
import datetime as dt
from counterbid.estimators import load_experiment
exp = load_experiment(spec)
day = dt.date.fromisoformat({day!r})
out = {{}}
if route == "spark":
    from counterbid.readers.spark_shards import spark_session
    from counterbid.operators.spark_contract import lake_day_on_spark, run_contract_on_spark, spark_auction_counts
    spark = spark_session("local[2]", {{"spark.sql.shuffle.partitions": "4"}})
    t0, c0 = time.perf_counter(), time.process_time()
    bids = lake_day_on_spark(spark, lake, experiment=exp, ds=day)
    results = run_contract_on_spark(spark, bids, exp)
    counts = spark_auction_counts(spark, bids)
    out["step_wall"], out["step_cpu"] = time.perf_counter() - t0, time.process_time() - c0
    pid = spark.sparkContext._gateway.proc.pid
    with open(f"/proc/{{pid}}/status") as fh:
        out["jvm_hwm_mib"] = next(int(l.split()[1]) for l in fh if l.startswith("VmHWM")) / 1024
    with open(f"/proc/{{pid}}/stat") as fh:
        fields = fh.read().rsplit(")", 1)[1].split()
    out["jvm_cpu"] = (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")
else:
    import duckdb
    from counterbid.operators.check_runner import _auction_counts
    from counterbid.operators.contract import run_contract
    t0, c0 = time.perf_counter(), time.process_time()
    con = duckdb.connect()
    con.execute(f"create view day_bids as select * from read_parquet('{{lake}}/ds={{day}}/*.parquet')")
    results = run_contract(con, "day_bids", exp)
    counts = _auction_counts(con, ["day_bids"])
    out["step_wall"], out["step_cpu"] = time.perf_counter() - t0, time.process_time() - c0
out["failed"] = [r.check for r in results if not r.passed]
out["auctions"] = int(counts["n_auctions"].sum())
out["self_rss_mib"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
print(json.dumps(out))
"""


def _run(route: str, lake: Path, spec: Path) -> dict:
    t0 = time.perf_counter()
    proc = subprocess.Popen([sys.executable, "-c", CHILD.format(day=str(DAY)), route, str(lake), str(spec)],
                            stdout=subprocess.PIPE, text=True)
    out = proc.stdout.read()
    _, status, usage = os.wait4(proc.pid, 0)
    if os.waitstatus_to_exitcode(status) != 0:
        raise SystemExit(f"{route}: exit {os.waitstatus_to_exitcode(status)}")
    found = json.loads(out.strip().splitlines()[-1])
    found |= {"cpu": usage.ru_utime + usage.ru_stime, "wall": time.perf_counter() - t0, "rss_mib": usage.ru_maxrss / 1024}
    return found


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--data", type=Path, required=True)
    parser.add_argument("--millions", type=int, default=1)
    args = parser.parse_args(argv)
    args.data.mkdir(parents=True, exist_ok=True)
    spec = args.data / "spec.yaml"
    spec.write_text(SPEC)
    lake = args.data / f"lake_{args.millions}m"
    write_lake(lake, args.millions, spec)
    print(f"load average before: {_loadavg()}")
    rows = ["| route | child CPU s | child wall s | child peak RSS MiB | Python peak RSS MiB | step CPU s | step wall s | "
            "JVM CPU s | JVM peak RSS MiB | auctions | failed |",
            "| --- | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | --- |"]
    for route in ("duckdb", "spark"):
        r = _run(route, lake, spec)
        jvm = (f"{r['jvm_cpu']:.2f} | {r['jvm_hwm_mib']:.0f}" if "jvm_cpu" in r else "- | -")
        rows.append(f"| {route} | {r['cpu']:.2f} | {r['wall']:.2f} | {r['rss_mib']:.0f} | {r['self_rss_mib']:.0f} | "
                    f"{r['step_cpu']:.2f} | "
                    f"{r['step_wall']:.2f} | {jvm} | {r['auctions']} | {','.join(r['failed']) or '-'} |")
    print(f"load average after: {_loadavg()}")
    print(f"{args.millions}M bids, string ids")
    print("\n".join(rows))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
