"""What a stratum with no bid at the floor costs, measured (not a test).

One stratum of ``--bids`` bids (4 bidders an auction, two arms, gsp, integer ids), each case in its own
child process (peak RSS from ``os.wait4``, imports included; CPU of the timed call from
``resource.getrusage``):

* ``eligible``: the floor at the 30 % quantile of the bids (the usual path: weights, kernel, sums);
* ``below``: the same bids scaled under the floor (``stratum_pieces`` writes exact zeros);
* ``plain``: the kernel's general formula run on those clamped bids with ``q* = 1`` (what the zeros
  replace: weight table, every label's weighted order statistic and influence).

Usage: python tests/benchmarks/bench_below_floor.py [--bids 2000000]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time

FLOOR = 0.3
SPEC = {"experiments": [{"id": "gullery", "control_arm": "even", "payment_rule": "gsp", "floor": FLOOR, "arms": [
    {"name": "even", "share": 0.6, "position_weights": [0.4, 0.25, 0.1]},
    {"name": "tall", "share": 0.4, "position_weights": [0.55, 0.2]}]}]}


def _bids(n_bids: int, below: bool):
    import numpy as np
    import pandas as pd

    rng = np.random.default_rng(5)
    auctions = n_bids // 4
    bid = rng.uniform(0.0, 1.0, auctions * 4)
    bid = bid * (FLOOR * 0.99) if below else bid
    return pd.DataFrame({"auction_id": np.repeat(np.arange(auctions), 4), "bidder_id": np.arange(auctions * 4),
                         "arm": np.where(np.repeat(np.arange(auctions), 4) % 5 < 3, "even", "tall"),
                         "bid": bid, "position": np.nan})


def child(case: str, n_bids: int) -> dict:
    import numpy as np

    from counterbid.estimators import parse_experiments, prepare_bids, stratum_pieces
    from counterbid.estimators.allocation import allocation_rule, mixture_rule
    from counterbid.estimators.payment_rules import Floor
    from counterbid.estimators.stratum import FloorStep, estimate_stratum, stratum_weights, table_weights

    exp = parse_experiments(SPEC)["gullery"]
    data = prepare_bids(_bids(n_bids, case != "eligible"), exp)
    before, started = resource.getrusage(resource.RUSAGE_SELF), time.perf_counter()
    if case == "plain":
        rules = [allocation_rule(a.weights_for(4), 4) for a in exp.arms]
        sorted_bids = np.maximum(np.sort(data.bid), FLOOR)
        step = FloorStep(Floor(FLOOR, 1.0), sorted_bids.size)
        rev, wel = stratum_weights(rules, mixture_rule(rules, exp.shares), sorted_bids.size, payment_rule="gsp",
                                   floor=step.floor)
        rev_w, wel_w = table_weights(rev, wel, 4, sorted_bids.size)
        sums = []
        out = estimate_stratum(sorted_bids, 4, rev_w, wel_w, step,
                               on_influence=lambda k, v: sums.append(np.bincount(data.auction, weights=v)))
        largest = float(np.nanmax(np.abs(out)))
    else:
        (piece,) = stratum_pieces(data, exp, cluster="auction")
        largest = float(np.nanmax(np.abs(piece.estimate)))
    after, wall = resource.getrusage(resource.RUSAGE_SELF), time.perf_counter() - started
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return {"case": case, "call_wall": wall, "call_cpu": cpu, "largest_estimate": largest}


def run_child(argv: list[str]) -> dict:
    started = time.perf_counter()
    with tempfile.TemporaryFile("w+") as out:
        proc = subprocess.Popen(argv, stdout=out, text=True)
        _, status, usage = os.wait4(proc.pid, 0)
        wall = time.perf_counter() - started
        out.seek(0)
        text = out.read()
    if status != 0:
        raise SystemExit(f"child {argv[3:]} failed with status {status}")
    return json.loads(text.strip().splitlines()[-1]) | {
        "wall": wall, "cpu": usage.ru_utime + usage.ru_stime, "rss_mib": usage.ru_maxrss / 1024}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--bids", type=int, default=2_000_000)
    ap.add_argument("--child", nargs=2)
    args = ap.parse_args()
    if args.child:
        print(json.dumps(child(args.child[0], int(args.child[1]))))
        return
    print(f"## one stratum of {args.bids} bids; load average {os.getloadavg()[0]:.2f} at the start\n")
    print("| case | call CPU s | call wall s | process CPU s | process wall s | peak RSS MiB | largest estimate |")
    print("|---|---:|---:|---:|---:|---:|---:|")
    for case in ("eligible", "below", "plain"):
        r = run_child([sys.executable, os.path.abspath(__file__), "--child", case, str(args.bids)])
        print(f"| {case} | {r['call_cpu']:.2f} | {r['call_wall']:.2f} | {r['cpu']:.2f} | {r['wall']:.2f} | "
              f"{r['rss_mib']:.0f} | {r['largest_estimate']:.3g} |")
    print(f"\nload average {os.getloadavg()[0]:.2f} at the end")


if __name__ == "__main__":
    main()
