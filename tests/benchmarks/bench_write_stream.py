"""The write step's per-bidder rows into the results sink: whole table vs staged file in batches (not a test).

Stages one day's ``stratum_piece_bidder_sums`` of ``--millions`` million rows (text bidder ids,
two arms, a segment on every fifth row) as Parquet, then writes it with
:meth:`ResultsHook.replace_partition` in a child process of its own, twice per sink:

* ``whole``: the file read with ``pq.read_table`` and handed over as one Arrow table (the write
  step before the staged rows were streamed);
* ``stream``: the file handed over as a dataset (:func:`staged_rows`), sent in batches of
  ``WRITE_BATCH_ROWS`` rows.

Reports each child's peak RSS (``ru_maxrss``), CPU seconds (user + sys, ``os.wait4``) and wall
time, with the load average before and after. ``--postgres URL`` adds a PostgreSQL sink.

``--hows whole`` with ``PYTHONPATH`` on a checkout of an earlier commit measures that commit's write.

Usage: python tests/benchmarks/bench_write_stream.py --work DIR [--millions 10] [--postgres URL] [--hows stream,whole]
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import subprocess
import sys
import time
from pathlib import Path

DAY = dt.date(2026, 8, 3)


def stage(path: Path, millions: float) -> None:
    """The staged bidder sums of one day (kept between runs)."""
    if path.exists():
        return
    import numpy as np
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    n = int(millions * 1_000_000)
    rng = np.random.default_rng(7)
    index = pa.array(np.arange(n) // 2)
    with pq.ParquetWriter(path.with_suffix(".partial"), _schema()) as out:
        for at in range(0, n, 1_000_000):
            k = index[at:at + 1_000_000]
            m = len(k)
            out.write_table(pa.table({
                "experiment_id": pa.array(["quarry"] * m), "ds": pa.array([DAY] * m, pa.date32()),
                "n_bidders": pa.array(np.full(m, 4), pa.int32()), "shard": pa.array(np.arange(m) % 8, pa.int32()),
                "bidder_id": pc.binary_join_element_wise("hauler-", pc.cast(k, pa.string()), ""),
                "arm": pa.array(np.where(np.arange(m) % 2 == 0, "steady", "swift")),
                "value": pa.array(rng.normal(size=m)), "run_id": pa.array(["b1"] * m),
                "computed_at": pa.array([dt.datetime(2026, 8, 4, 2, tzinfo=dt.timezone.utc)] * m,
                                        pa.timestamp("us", tz="UTC")),
                "segment": pa.array([None if (at + j) % 5 else "early" for j in range(m)], pa.string())},
                schema=_schema()))
    path.with_suffix(".partial").rename(path)


def _schema():
    import pyarrow as pa

    return pa.schema([("experiment_id", pa.string()), ("ds", pa.date32()), ("n_bidders", pa.int32()),
                      ("shard", pa.int32()), ("bidder_id", pa.string()), ("arm", pa.string()),
                      ("value", pa.float64()), ("run_id", pa.string()), ("computed_at", pa.timestamp("us", tz="UTC")),
                      ("segment", pa.string())])


def child(how: str, database: str, staged: Path) -> None:
    import pyarrow.parquet as pq

    from counterbid.operators.hooks import ResultsHook

    if how == "whole":
        rows = pq.read_table(staged)
    else:
        from counterbid.operators.results_schema import staged_rows

        rows = staged_rows(staged)
    counts = ResultsHook(database=database).replace_partition(experiment_id="quarry", ds=DAY,
                                                              tables={"stratum_piece_bidder_sums": rows})
    print(counts["stratum_piece_bidder_sums"])


def run(how: str, database: str, staged: Path) -> dict:
    start = time.perf_counter()
    proc = subprocess.Popen([sys.executable, __file__, "--child", how, "--database", database, "--staged", str(staged)],
                            stdout=subprocess.PIPE)
    _, status, usage = os.wait4(proc.pid, 0)
    rows = proc.stdout.read().decode().strip()
    if status != 0:
        raise SystemExit(f"{how} on {database}: child exited with {status}")
    return {"how": how, "rows": rows, "wall_s": time.perf_counter() - start,
            "cpu_s": usage.ru_utime + usage.ru_stime, "peak_rss_mib": usage.ru_maxrss / 1024}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--work", type=Path)
    parser.add_argument("--millions", type=float, default=10.0)
    parser.add_argument("--postgres")
    parser.add_argument("--hows", default="stream,whole", help="comma-separated: stream, whole")
    parser.add_argument("--child", choices=["whole", "stream"])
    parser.add_argument("--database")
    parser.add_argument("--staged", type=Path)
    args = parser.parse_args()
    if args.child:
        child(args.child, args.database, args.staged)
        return
    args.work.mkdir(parents=True, exist_ok=True)
    staged = args.work / f"bidder_sums_{args.millions:g}m.parquet"
    stage(staged, args.millions)
    print(f"load average before: {os.getloadavg()}")
    sinks = [("duckdb", str(args.work / "results.duckdb"))] + ([("postgres", args.postgres)] if args.postgres else [])
    print(f"{'sink':9} {'rows':>10} {'how':7} {'wall s':>8} {'CPU s':>8} {'peak RSS MiB':>13}")
    for name, database in sinks:
        for how in args.hows.split(","):
            r = run(how, database, staged)
            print(f"{name:9} {r['rows']:>10} {how:7} {r['wall_s']:8.1f} {r['cpu_s']:8.1f} {r['peak_rss_mib']:13.0f}")
    print(f"load average after: {os.getloadavg()}")


if __name__ == "__main__":
    main()
