"""Strata and shards, measured (``make bench-strata``; not a test).

Two measurements the per-arm benchmark (``bench_estimator.py``) does not make:

* **Memory per shard**: peak RSS of ``counterbid estimate --format json`` at 10M and 30M bids
  (the three-arm experiment of ``bench_estimator.py``, 5 bidders per auction) with the default
  ``--max-bids-per-shard`` (4M: 3 and 8 shards), and with the whole log as one shard for
  comparison; each run in its own child process, peak RSS from ``os.wait4``.
* **A long backfill stays flat**: ``counterbid backfill`` called once per day over a 12-day lake
  of 1M bids a day (``dags_example/lake.py``), one results database and one Airflow home (its
  metadata migrated before the first day), wall time of each call; the last three days against
  the first three.

Usage: python tests/benchmarks/bench_strata.py [--sizes 10,30] [--days 12] [--bids-per-day 1000000]
       [--data DIR] [--out FILE] [--skip memory,backfill]
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from bench_estimator import N_BIDDERS, SPEC, make_data, run_child  # noqa: E402

START = dt.date(2026, 3, 2)


def memory_rows(folder: Path, sizes: list[int], spec_path: Path, me: list[str]) -> list[str]:
    exe = str(Path(sys.executable).with_name("counterbid"))
    env = {k: v for k, v in os.environ.items() if k != "COUNTERBID_MAX_BIDS_PER_SHARD"}
    lines = ["| bids | max bids per shard | shards | wall s | peak RSS MiB | revenue per auction (control) |",
             "|---:|---:|---:|---:|---:|---:|"]
    for millions in sizes:
        path = make_data(folder, millions, spec_path, me)
        for max_bids in (None, 10**9):
            argv = [exe, "estimate", "--bids", str(path), "--experiment", str(spec_path), "--format", "json"]
            if max_bids is not None:
                argv += ["--max-bids-per-shard", str(max_bids)]
            r = run_child(argv, env=env)
            shards = r.get("shards", "?")
            rev = next((row["estimate"] for row in r.get("rows", [])
                        if row["arm"] == "control" and row["metric"] == "revenue_per_auction"), float("nan"))
            label = "default (4M)" if max_bids is None else "one shard"
            lines.append(f"| {millions}M | {label} | {shards} | {r['wall']:.1f} | {r['rss_mib']:.0f} | {rev:.6f} |")
            print(lines[-1], file=sys.stderr, flush=True)
    return lines


def backfill_rows(folder: Path, days: int, bids_per_day: int, spec_path: Path) -> tuple[list[str], str]:
    lake = folder / f"lake_{days}d_{bids_per_day}"
    exe = str(Path(sys.executable).with_name("counterbid"))
    if not lake.exists():
        # written by a child: a child forked after the parent held the lake's frames would start its
        # peak RSS (ru_maxrss) at the parent's, inflating every backfill row below
        subprocess.run([exe, "simulate", "--experiment", str(spec_path), "--out", str(lake), "--start", START.isoformat(),
                        "--days", str(days), "--auctions-per-day", str(bids_per_day // N_BIDDERS),
                        "--bidders", str(N_BIDDERS), "--seed", "12"], check=True, stdout=subprocess.DEVNULL)
    results = folder / "backfill_results.duckdb"
    results.unlink(missing_ok=True)
    home = folder / "airflow_home"
    env = {k: v for k, v in os.environ.items() if not k.startswith(("AIRFLOW", "COUNTERBID_"))}
    lines = ["| day | wall s (whole call) | DAG run s | steps | peak RSS MiB |", "|---|---:|---:|---|---:|"]
    walls = []
    for k in range(days):
        day = (START + dt.timedelta(days=k)).isoformat()
        r = run_child([exe, "backfill", "--lake", str(lake), "--experiments", str(spec_path), "--results", str(results),
                       "--start", day, "--end", day, "--airflow-home", str(home)], env=env)
        line = next((ln for ln in r["stderr"].splitlines() if ln.startswith(day)), "")
        parts = line.split()
        dag_s = parts[2].rstrip("s") if len(parts) > 2 else "?"
        steps = line[line.find("(") + 1:line.rfind(")")] if "(" in line else ""
        walls.append(r["wall"])
        lines.append(f"| {day} | {r['wall']:.1f} | {dag_s} | {steps} | {r['rss_mib']:.0f} |")
        print(lines[-1], file=sys.stderr, flush=True)
    first, last = statistics.mean(walls[:3]), statistics.mean(walls[-3:])
    note = (f"{days}-day backfill, {bids_per_day:,} bids a day, one call per day: first three days "
            f"{', '.join(f'{w:.1f}' for w in walls[:3])} s (mean {first:.1f}), last three "
            f"{', '.join(f'{w:.1f}' for w in walls[-3:])} s (mean {last:.1f}); ratio {last / first:.2f} (target <= 1.5)")
    return lines, note


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--sizes", default="10,30", help="bid counts in millions for the memory rows (default 10,30)")
    p.add_argument("--days", type=int, default=12)
    p.add_argument("--bids-per-day", type=int, default=1_000_000)
    p.add_argument("--data", help="folder for the simulated data (kept; default: temporary)")
    p.add_argument("--out", help="also write the markdown here")
    p.add_argument("--skip", default="", help="comma-separated parts to skip (memory, backfill)")
    args = p.parse_args(argv)
    skip = set(filter(None, args.skip.split(",")))
    folder = Path(args.data) if args.data else Path(tempfile.mkdtemp(prefix="counterbid-bench-strata-"))
    folder.mkdir(parents=True, exist_ok=True)
    spec_path = folder / "bench.yaml"
    spec_path.write_text(SPEC)
    me = [sys.executable, str(HERE / "bench_estimator.py")]
    out: list[str] = [f"load average at the start: {os.getloadavg()[0]:.2f}", ""]
    if "memory" not in skip:
        out += memory_rows(folder, [int(s) for s in args.sizes.split(",")], spec_path, me) + [""]
    if "backfill" not in skip:
        lines, note = backfill_rows(folder, args.days, args.bids_per_day, spec_path)
        out += lines + ["", f"* {note}"]
    text = "\n".join(out) + "\n"
    print(text)
    if args.out:
        Path(args.out).write_text(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
