"""The running window's rebuild against the number of stored days, measured (not a test).

``build``: the lake of ``bench_window.py`` (1M bids a day by default), run day by day through
load, estimate and write on one DuckDB results file; after day ``n + 1`` for each ``n`` of
``--stored`` a copy of the results file is kept (``results-<n>.duckdb``: a window of ``n + 1``
days). ``rerun``: for each copy, the last day is loaded again and its estimate step run again on
a fresh copy of the file, in a child process of its own (CPU s = user + sys and peak RSS from
``os.wait4``): the rerun of a day the window holds rebuilds the window from the ``n`` earlier
stored days and today. ``--code`` points the children at another checkout's packages (a folder
holding ``counterbid/<package>`` links), so the same files measure the code before and after.

Usage: python tests/benchmarks/bench_window_rebuild.py build --data DIR [--stored 1,3,6] [--bids-per-day N]
       python tests/benchmarks/bench_window_rebuild.py rerun --data DIR [--stored 1,3,6] [--code DIR] [--label L]
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import shutil
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_window import SPEC, START, make_lake, run_child  # noqa: E402

ME = [sys.executable, str(Path(__file__).resolve().parent / "bench_window.py"), "--child"]


def _env(code: Path | None) -> dict:
    env = dict(os.environ)
    if code:
        env["PYTHONPATH"] = f"{code}{os.pathsep}{env.get('PYTHONPATH', '')}"
    return env


def _day(k: int) -> str:
    return str(START + dt.timedelta(days=k))


def build(data: Path, stored: list[int], bids: int) -> None:
    days = max(stored) + 1
    lake = data / f"lake_{days}d_{bids}"
    make_lake(lake, days, bids)
    work = data / "build"
    work.mkdir(parents=True, exist_ok=True)
    (work / "spec.yaml").write_text(SPEC)
    if not (work / "lake").exists():
        (work / "lake").symlink_to(lake.resolve())
    env = _env(None)
    for k in range(days):
        run_child([*ME, "prepare", str(work), _day(k)], env)
        e = run_child([*ME, "estimate", str(work), _day(k)], env)
        w = run_child([*ME, "write", str(work), _day(k)], env)
        print(f"day {k + 1}: {e['route']} estimate CPU {e['cpu']:.1f} s, {e['rss_mib']:.0f} MiB; write CPU "
              f"{w['cpu']:.1f} s; load {os.getloadavg()[0]:.2f}", flush=True)
        if k in stored:
            shutil.copy(work / "results.duckdb", data / f"results-{k}.duckdb")


def rerun(data: Path, stored: list[int], code: Path | None, label: str) -> None:
    env = _env(code)
    print(f"## {label}: rerun of the last day, the window rebuilt from n stored days\n")
    print("| stored days | route | estimate wall s | estimate CPU s | estimate peak RSS MiB | load avg before / after |")
    print("|---:|---|---:|---:|---:|---|")
    for n in stored:
        work = data / f"rerun-{label.replace(' ', '-')}-{n}"
        shutil.rmtree(work, ignore_errors=True)
        work.mkdir(parents=True)
        (work / "spec.yaml").write_text(SPEC)
        (work / "lake").symlink_to((data / "build" / "lake").resolve())
        shutil.copy(data / f"results-{n}.duckdb", work / "results.duckdb")
        run_child([*ME, "prepare", str(work), _day(n)], env)
        before = os.getloadavg()[0]
        r = run_child([*ME, "estimate", str(work), _day(n)], env)
        print(f"| {n} | {r['route']} | {r['wall']:.1f} | {r['cpu']:.1f} | {r['rss_mib']:.0f} | "
              f"{before:.2f} / {os.getloadavg()[0]:.2f} |", flush=True)
        shutil.rmtree(work, ignore_errors=True)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("what", choices=("build", "rerun"))
    ap.add_argument("--data", type=Path, required=True)
    ap.add_argument("--stored", default="1,3,6")
    ap.add_argument("--bids-per-day", type=int, default=1_000_000)
    ap.add_argument("--code", type=Path, default=None)
    ap.add_argument("--label", default="this checkout")
    args = ap.parse_args()
    stored = sorted(int(s) for s in args.stored.split(","))
    if args.what == "build":
        build(args.data, stored, args.bids_per_day)
    else:
        rerun(args.data, stored, args.code, args.label)


if __name__ == "__main__":
    main()
