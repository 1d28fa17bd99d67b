"""The experiment-to-date step against the experiment's age, measured (not a test).

A 12-day lake of one experiment (the three-arm spec of ``bench_estimator.py``, 5 bidders an
auction) whose bidder ids are mostly distinct strings (drawn from a pool of 20x the day's bids, so
a few repeat and ``auto`` clusters by bidder), run day by day through the pipeline's steps on one
DuckDB results file: the estimate step alone in a child process (its wall time, CPU seconds and
peak RSS from ``os.wait4``), the day's write in another (the same), and the day's load in a third
(the validate step is recorded as passed without running the contract suite: it does not touch
the to-date rows). ``--route shard-tasks`` estimates the day as the daily DAG on the local engine
(and so ``counterbid backfill``) does: one child per staged shard (the mapped ``estimate_shard``
task), then the estimate step combining their pieces (``shard_tasks=True``) in another; the
estimate columns are then the shard children's and the combining child's CPU summed, and the
largest of their peak RSS. The default, ``single-task``, estimates every shard inside the estimate
step. ``--code`` points the
children at another checkout's packages (a folder holding ``counterbid/<package>`` links), so the
same lake measures the code before and after a change.

Usage: python tests/benchmarks/bench_window.py [--days 12] [--bids-per-day 1000000] [--data DIR]
       [--code DIR] [--label after] [--route single-task|shard-tasks]
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
START = dt.date(2026, 3, 2)
SPEC = """
experiments:
  - id: bench
    control_arm: control
    start: 2026-03-02
    checks: {warmup: {days: 0}}
    arms:
      - {name: control, share: 0.8, position_weights: [0.31, 0.17, 0.06, 0.02]}
      - {name: wide,    share: 0.1, position_weights: [0.29, 0.22, 0.15, 0.02]}
      - {name: five,    share: 0.1, position_weights: [0.29, 0.19, 0.10, 0.05, 0.02]}
"""


def make_lake(root: Path, days: int, bids_per_day: int) -> None:
    import numpy as np
    import scipy.stats as st

    from counterbid.estimators import parse_experiments, simulate_experiment
    import yaml

    exp = parse_experiments(yaml.safe_load(SPEC))["bench"]
    for k in range(days):
        folder = root / f"ds={START + dt.timedelta(days=k)}"
        if (folder / "bench.parquet").exists():
            continue
        frame = simulate_experiment(st.lognorm(0.5, scale=0.8), exp, n_bidders=5, n_auctions=bids_per_day // 5,
                                    rng=100 + k, bidder_pool=20 * bids_per_day, first_auction_id=10**9 * k)
        frame = frame.drop(columns=["ds"], errors="ignore")
        frame["bidder_id"] = np.char.add("acct-", frame["bidder_id"].to_numpy().astype(str)).astype(object)
        folder.mkdir(parents=True, exist_ok=True)
        frame.to_parquet(folder / "bench.parquet", index=False)
        print(f"lake day {k + 1}: {len(frame)} bids, {frame['bidder_id'].nunique()} distinct bidders",
              file=sys.stderr, flush=True)


def child(step: str, work: Path, day: str) -> dict:
    from counterbid.estimators import load_experiment
    from counterbid.operators import partition
    from counterbid.operators.hooks import ResultsHook
    from counterbid.operators.lake_hook import LakeHook
    from counterbid.operators.staging import StagedPartition

    exp = load_experiment(work / "spec.yaml")
    ds = dt.date.fromisoformat(day)
    hook = ResultsHook(database=work / "results.duckdb", lock_timeout=60)
    stage = work / "stage"
    t0 = time.perf_counter()
    out: dict = {}
    if step in ("prepare", "write+prepare"):
        if step == "write+prepare":  # the previous day's write, then this day's load and validate
            previous = ds - dt.timedelta(days=1)
            partition.write_partition(hook, experiment_id=exp.id, ds=previous, staging_root=stage)
        partition.stage_partition(LakeHook(), lake_root=work / "lake", experiment=exp, ds=ds, staging_root=stage)
        staged = StagedPartition.at(stage, exp.id, ds)
        # the contract suite is not what this measures (and costs as much as the rest on a loaded
        # machine): the day is recorded as checked with no failure, as the validate step would
        out["status"] = partition.record_checks(staged, [])
    elif step.startswith("shard:"):  # one mapped shard task of the daily DAG
        out["shard"] = partition.estimate_partition_shard(exp, ds=ds, staging_root=stage,
                                                          shard=int(step.split(":", 1)[1]))["shard"]
    elif step in ("estimate", "combine"):  # combine: the estimate step after the shard tasks
        summary = partition.estimate_partition(hook, experiment=exp, ds=ds, staging_root=stage, run_id=f"bench-{day}",
                                               shard_tasks=step == "combine")
        out["route"] = summary.get("bidder_window", "-")
        out["to_date_bids"] = summary.get("to_date_bids")
        out["control"] = summary.get("to_date_revenue_per_auction", {}).get("control")
    else:
        partition.write_partition(hook, experiment_id=exp.id, ds=ds, staging_root=stage)
    out["work"] = time.perf_counter() - t0
    return out


def run_child(argv: list[str], env: dict) -> dict:
    started = time.perf_counter()
    with tempfile.TemporaryFile("w+") as out:
        proc = subprocess.Popen(argv, stdout=out, env=env, text=True)
        _, status, usage = os.wait4(proc.pid, 0)
        wall = time.perf_counter() - started
        out.seek(0)
        text = out.read()
    if status != 0:
        raise SystemExit(f"child {argv[3:]} failed with status {status}")
    return json.loads(text.strip().splitlines()[-1]) | {"wall": wall, "rss_mib": usage.ru_maxrss / 1024,
                                                        "cpu": usage.ru_utime + usage.ru_stime}


def estimate_children(me: list[str], work: Path, day: str, env: dict, route: str) -> dict:
    """The day's estimate by ``route``: the estimate step's result, with CPU summed and peak RSS the largest
    over its children (``shard_cpu`` and ``shard_rss_mib``: the shard children's part; ``shards``: how many)."""
    if route == "single-task":
        return run_child([*me, "estimate", str(work), day], env) | {"shards": None, "shard_cpu": 0.0, "shard_rss_mib": 0.0}
    shards = [run_child([*me, f"shard:{k}", str(work), day], env) for k in shard_tasks(work / "stage", day)]
    return combined(shards, run_child([*me, "combine", str(work), day], env))


def shard_tasks(stage: Path, day: str) -> list[int]:
    """The shards the DAG runs a shard task for: every staged shard of a day of two or more; none for a
    one-shard day, which the estimate step estimates itself (the DAG marks its shard task skipped)."""
    shards = staged_shards(stage, day)
    return shards if len(shards) > 1 else []


def staged_shards(stage: Path, day: str) -> list[int]:
    """The shards the load step staged for ``day`` (``stage/bench/ds=DAY/day/shard=K``), ascending; read from
    the folder names, so this small parent process imports no part of the library (its children's peak RSS
    would start from it)."""
    found = (stage / "bench" / f"ds={day}" / "day").glob("shard=*")
    return sorted(int(p.name.split("=", 1)[1]) for p in found if p.is_dir() and p.name.split("=", 1)[1].isdigit())


def combined(shards: list[dict], combine: dict) -> dict:
    """The combining child's result with the shard children's CPU and wall added and the largest peak RSS."""
    shard_cpu = sum(s["cpu"] for s in shards)
    shard_rss = max((s["rss_mib"] for s in shards), default=0.0)
    return combine | {"shards": len(shards), "shard_cpu": shard_cpu, "shard_rss_mib": shard_rss,
                      "combine_cpu": combine["cpu"], "combine_rss_mib": combine["rss_mib"],
                      "cpu": combine["cpu"] + shard_cpu, "wall": combine["wall"] + sum(s["wall"] for s in shards),
                      "rss_mib": max(combine["rss_mib"], shard_rss)}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--days", type=int, default=12)
    ap.add_argument("--bids-per-day", type=int, default=1_000_000)
    ap.add_argument("--data", type=Path, default=None)
    ap.add_argument("--code", type=Path, default=None)
    ap.add_argument("--label", default="this checkout")
    ap.add_argument("--route", choices=("single-task", "shard-tasks"), default="single-task")
    ap.add_argument("--child", nargs=3)
    args = ap.parse_args()
    if args.child:
        print(json.dumps(child(args.child[0], Path(args.child[1]), args.child[2])))
        return
    data = args.data or Path(tempfile.mkdtemp(prefix="counterbid-window-"))
    lake = data / f"lake_{args.days}d_{args.bids_per_day}"
    make_lake(lake, args.days, args.bids_per_day)
    work = Path(tempfile.mkdtemp(prefix="run-", dir=data))
    (work / "spec.yaml").write_text(SPEC)
    (work / "lake").symlink_to(lake)
    env = dict(os.environ)
    if args.code:
        env["PYTHONPATH"] = f"{args.code}{os.pathsep}{env.get('PYTHONPATH', '')}"
    me = [sys.executable, str(Path(__file__).resolve()), "--child"]
    print(f"## {args.label}: {args.days} days of {args.bids_per_day} bids\n")
    print(f"estimate route: {args.route}\n")
    print("| day | route | estimate wall s | estimate CPU s | estimate peak RSS MiB | of which shard tasks CPU s "
          "/ peak RSS MiB | write CPU s | write peak RSS MiB | to-date bids | load avg |")
    print("|---:|---|---:|---:|---:|---|---:|---:|---:|---:|")
    rows = []
    for k in range(args.days):
        day = str(START + dt.timedelta(days=k))
        run_child([*me, "prepare", str(work), day], env)
        r = estimate_children(me, work, day, env, args.route)
        # the day's write in a process of its own (CPU and peak RSS of the write step alone)
        w = run_child([*me, "write", str(work), day], env)
        r |= {"write_cpu": w["cpu"], "write_rss": w["rss_mib"]}
        rows.append(r)
        shard_part = "-" if r["shards"] is None else f"{r['shard_cpu']:.1f} / {r['shard_rss_mib']:.0f} ({r['shards']})"
        print(f"| {k + 1} | {r['route']} | {r['wall']:.1f} | {r['cpu']:.1f} | {r['rss_mib']:.0f} | {shard_part} | {w['cpu']:.1f} "
              f"| {w['rss_mib']:.0f} | {r['to_date_bids']} | {os.getloadavg()[0]:.2f} |", flush=True)
    first, last = rows[:3], rows[-3:]
    mean = lambda rs, key: sum(r[key] for r in rs) / len(rs)  # noqa: E731
    print(f"\nfirst three days: estimate CPU {mean(first, 'cpu'):.1f} s, peak RSS {mean(first, 'rss_mib'):.0f} MiB, "
          f"write CPU {mean(first, 'write_cpu'):.1f} s; last three: {mean(last, 'cpu'):.1f} s, "
          f"{mean(last, 'rss_mib'):.0f} MiB, write CPU {mean(last, 'write_cpu'):.1f} s")


if __name__ == "__main__":
    main()
