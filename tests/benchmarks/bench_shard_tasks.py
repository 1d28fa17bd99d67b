"""One shard task's time and peak memory, measured (not a test): how to size workers for the mapped shards.

One lake day of one experiment (the three-arm spec of ``bench_window.py``, 5 bidders an auction,
bidder ids mostly distinct strings, so ``auto`` clusters by bidder and every shard keeps per-bidder
sums) is staged by the load step with the default ``max_bids_per_shard`` (4M) and recorded as
checked (the contract suite is not what this measures). Then, each in its own child process (peak
RSS from ``os.wait4``, imports included): every shard task (``estimate_partition_shard``), the
estimate step combining their pieces (``estimate_partition(shard_tasks=True)``), and for
comparison the single-task estimate that reads the shards one after another.

Usage: python tests/benchmarks/bench_shard_tasks.py [--bids 8000000] [--data DIR]
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import sys
import tempfile
import time
from pathlib import Path

from bench_window import SPEC, START, run_child

N_BIDDERS = 5


def make_day(lake: Path, bids: int) -> None:
    """``lake/ds=START/bench.parquet``: ``bids`` bids, bidder ids drawn from a pool of 20x the bids."""
    import numpy as np
    import scipy.stats as st
    import yaml

    from counterbid.estimators import parse_experiments, simulate_experiment

    target = lake / f"ds={START}" / "bench.parquet"
    if target.exists():
        return
    exp = parse_experiments(yaml.safe_load(SPEC))["bench"]
    frame = simulate_experiment(st.lognorm(0.5, scale=0.8), exp, n_bidders=N_BIDDERS, n_auctions=bids // N_BIDDERS,
                                rng=57, bidder_pool=20 * bids)
    frame = frame.drop(columns=["ds"], errors="ignore")
    frame["bidder_id"] = np.char.add("seat-", frame["bidder_id"].to_numpy().astype(str)).astype(object)
    target.parent.mkdir(parents=True, exist_ok=True)
    frame.to_parquet(target, index=False)
    print(f"lake day: {len(frame)} bids, {frame['bidder_id'].nunique()} distinct bidders", file=sys.stderr, flush=True)


def child(step: str, work: Path, arg: str) -> dict:
    from counterbid.estimators import load_experiment
    from counterbid.operators import partition
    from counterbid.operators.hooks import ResultsHook
    from counterbid.operators.lake_hook import LakeHook
    from counterbid.operators.staging import StagedPartition

    exp = None if step == "simulate" else load_experiment(work / "spec.yaml")
    stage = work / "stage"
    t0 = time.perf_counter()
    out: dict = {}
    if step == "simulate":
        make_day(work, int(arg))
        return {}
    if step == "load":
        out = partition.stage_partition(LakeHook(), lake_root=work / "lake", experiment=exp, ds=START,
                                        staging_root=stage)
        partition.record_checks(StagedPartition.at(stage, exp.id, START), [])  # recorded as checked, no failure
    elif step == "shard":
        out = partition.estimate_partition_shard(exp, ds=START, staging_root=stage, shard=int(arg))
    else:  # 'combine' (the shard tasks' pieces) or 'single' (the shards one after another in this task)
        hook = ResultsHook(database=work / f"results-{step}.duckdb", lock_timeout=60)
        summary = partition.estimate_partition(hook, experiment=exp, ds=START, staging_root=stage, run_id="bench",
                                               shard_tasks=step == "combine")
        out = {"control": summary["day_revenue_per_auction"]["control"], "bids": summary["day_bids"]}
    out["work"] = time.perf_counter() - t0
    return out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--bids", type=int, default=8_000_000)
    ap.add_argument("--data", type=Path, default=None)
    ap.add_argument("--child", nargs=3)
    args = ap.parse_args()
    if args.child:
        print(json.dumps(child(args.child[0], Path(args.child[1]), args.child[2]), default=str))
        return
    data = args.data or Path(tempfile.mkdtemp(prefix="counterbid-shards-"))
    lake = data / f"lake_{args.bids}"
    me = [sys.executable, str(Path(__file__).resolve()), "--child"]
    # simulated in a child: a child's ru_maxrss starts at this parent's own peak (vfork), so a parent
    # that once held the day would set the floor of every row's peak RSS
    run_child([*me, "simulate", str(lake), str(args.bids)], None)
    work = Path(tempfile.mkdtemp(prefix="run-", dir=data))
    (work / "spec.yaml").write_text(SPEC)
    (work / "lake").symlink_to(lake)
    env = None
    load = run_child([*me, "load", str(work), "-"], env)
    print(f"## {args.bids} bids on {START}: {load['shards']} shard(s) of at most {load['max_bids_per_shard']} bids\n")
    print("| step | wall s | work s | peak RSS MiB | bids |")
    print("|---|---:|---:|---:|---:|")
    print(f"| load (stage) | {load['wall']:.1f} | {load['work']:.1f} | {load['rss_mib']:.0f} | {load['day_bids']} |")
    for k in range(int(load["shards"])):
        r = run_child([*me, "shard", str(work), str(k)], env)
        print(f"| estimate_shard {k} | {r['wall']:.1f} | {r['work']:.1f} | {r['rss_mib']:.0f} | {r['bids']} |", flush=True)
    for step in ("combine", "single"):
        r = run_child([*me, step, str(work), "-"], env)
        name = "estimate (combines the pieces)" if step == "combine" else "estimate, single task (for comparison)"
        print(f"| {name} | {r['wall']:.1f} | {r['work']:.1f} | {r['rss_mib']:.0f} | {r['bids']} |", flush=True)


if __name__ == "__main__":
    main()
