"""The DAG's Spark estimate step at millions of distinct bidders: driver and worker memory, measured (not a test).

One day of one experiment in a Hive-partitioned lake, four bidders an auction, bidder ids as
text and distinct but for every tenth bid, which comes from a pool of a thousand ids (so ids
repeat and the day is clustered by bidder). A child process per route starts a ``local[2]``
Spark session under the default driver settings (no ``spark.driver.memory``) and estimates the
day's shards of at most ``--bids-per-shard`` bids, clustered by bidder, the way the estimate step does:

* ``driver``: the pieces come back with their bidder sums (the step before the executors
  staged them: every shard's per-bidder arrays travel to the driver);
* ``executors``: each shard's worker writes its ``stratum_piece_bidder_sums`` rows to a staging
  folder and the pieces come back without them, with the day's Gram forms; then the running
  window's read-back (:func:`counterbid.operators.staged_bidder_sums.pieces_with_staged_sums`)
  and its full form (``gram_of(bidder_totals(...))``, the plain formula beside the executors' form).

Reported per route: wall and CPU seconds (user + sys of the Python process, ``os.wait4``), the
Python process's peak RSS after the Spark step and at the end (``ru_maxrss``), the JVM's peak
(``VmHWM``) and the largest Python worker RSS seen (sampled every 0.3 s), the load average.
Also what the test of the same name asserts: no piece with per-bidder arrays on the driver, the
form's distinct bidders, and its largest relative difference from the plain formula.

Usage: python tests/benchmarks/bench_spark_bidder_window.py --bidders 8000000 [--routes driver,executors]
       [--data DIR] [--bids-per-shard 1000000]
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import resource
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

DAY = dt.date(2026, 5, 11)
SPEC = {"experiments": [{"id": "ferns", "control_arm": "even", "start": "2026-05-01", "arms": [
    {"name": "even", "share": 0.6, "position_weights": [0.35, 0.18, 0.07]},
    {"name": "tilted", "share": 0.4, "position_weights": [0.42, 0.15, 0.04]}]}]}
PER_AUCTION = 4
POOL = 1000


def expected_distinct(n_bids: int) -> int:
    """Distinct ids of :func:`write_day`: one per bid outside every tenth, plus the pool's ids used."""
    pooled = len(range(0, n_bids, 10))
    return n_bids - pooled + min(POOL, pooled)


def write_day(root: Path, n_bids: int, *, rows_per_file: int = 1_000_000) -> Path:
    """The lake day (``root/ds=DAY/part-K.parquet``), simulated once and kept."""
    import pyarrow as pa
    import pyarrow.parquet as pq
    import scipy.stats as st

    from counterbid.estimators import parse_experiments, simulate_experiment

    folder = root / f"ds={DAY}"
    done = folder / "_complete"
    if done.exists():
        return root
    folder.mkdir(parents=True, exist_ok=True)
    exp = parse_experiments(SPEC)["ferns"]
    auctions_per_file = rows_per_file // PER_AUCTION
    n_auctions = n_bids // PER_AUCTION
    for k, first in enumerate(range(0, n_auctions, auctions_per_file)):
        count = min(auctions_per_file, n_auctions - first)
        bids = simulate_experiment(st.lognorm(0.5, scale=0.8), exp, n_bidders=PER_AUCTION, n_auctions=count, rng=k,
                                   first_auction_id=first)
        bids = bids.drop(columns=["ds", "value", "clicks"]).reset_index(drop=True)
        row = bids.index.to_numpy() + first * PER_AUCTION  # the bid's row in the day
        text = "seat-" + row.astype(str).astype(object)
        pooled = row % 10 == 0  # at most one bid an auction: four rows an auction
        text[pooled] = "pool-" + ((row[pooled] // 10) % POOL).astype(str).astype(object)
        bids["bidder_id"] = text
        pq.write_table(pa.Table.from_pandas(bids, preserve_index=False), folder / f"part-{k:03d}.parquet")
    done.touch()
    return root


class Sampler(threading.Thread):
    """The RSS of the JVM and of the Python workers below it, every ``every`` seconds."""

    def __init__(self, every: float = 0.3):
        super().__init__(daemon=True)
        self.every, self.stop, self.jvm, self.worker, self.workers_sum = every, threading.Event(), 0, 0, 0

    def run(self) -> None:
        import psutil

        me = psutil.Process()
        while not self.stop.wait(self.every):
            total = 0
            for child in me.children(recursive=True):
                try:
                    rss = child.memory_info().rss
                    if "java" in child.name():
                        self.jvm = max(self.jvm, _hwm(child.pid) or rss)
                    elif "python" in child.name():
                        self.worker = max(self.worker, rss)
                        total += rss
                except psutil.Error:
                    continue
            self.workers_sum = max(self.workers_sum, total)


def _hwm(pid: int) -> int | None:
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) * 1024
    except OSError:
        return None
    return None


def child(args) -> dict:
    """One route in this process: the Spark step, then (executors) the window's read-back."""
    import math

    import numpy as np

    from counterbid.estimators import bidder_totals, gram_of, parse_experiments
    from counterbid.operators.staged_bidder_sums import ShardRowsSink, pieces_with_staged_sums
    from counterbid.readers.spark_shards import lake_partition_pieces_on_spark, spark_session

    exp = parse_experiments(SPEC)["ferns"]
    root = Path(args.data)
    shards = math.ceil(args.bidders / args.bids_per_shard)
    spark = spark_session("local[2]", {"spark.sql.shuffle.partitions": str(max(2, shards))})
    driver_memory = spark.sparkContext.getConf().get("spark.driver.memory", None)
    sampler = Sampler()
    sampler.start()
    staged = Path(tempfile.mkdtemp(prefix="bench-bidder-rows-", dir=args.data))
    sink = ShardRowsSink(str(staged), experiment_id=exp.id, ds=DAY, run_id="bench", computed_at="2026-05-12T00:00Z") \
        if args.route == "executors" else None
    out = {"route": args.route, "bids": args.bidders, "shards": shards, "driver_memory": driver_memory,
           "load_before": os.getloadavg()}
    t0, c0 = time.perf_counter(), time.process_time()
    try:
        found = lake_partition_pieces_on_spark(spark, str(root), experiment=exp, ds=DAY, shards=shards,
                                               cluster="bidder", bidder_rows_sink=sink)
    except Exception as exc:  # the driver route may run out of memory: report its one line
        out.update(failed=str(exc).splitlines()[0][:300], spark_wall=time.perf_counter() - t0)
        found = None
    else:
        out.update(spark_wall=time.perf_counter() - t0, spark_cpu=time.process_time() - c0,
                   pieces=len(found.pieces), pieces_with_arrays=sum(p.bidder_ids is not None for p in found.pieces))
    out["python_rss_after_spark_mib"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    sampler.stop.set()
    sampler.join()
    out.update(jvm_hwm_mib=sampler.jvm / 2**20, worker_max_rss_mib=sampler.worker / 2**20,
               workers_sum_max_mib=sampler.workers_sum / 2**20)
    if found is not None and found.gram is not None:
        out["gram_bidders"] = int(found.gram.n_bidders)
        t1 = time.perf_counter()
        back = pieces_with_staged_sums(found.pieces, staged)
        out["read_back_wall"] = time.perf_counter() - t1
        out["staged_rows"] = sum(int(p.bidder_ids.size) * len(p.sum_labels) for p in back)
        plain = gram_of(bidder_totals(back, bid_exponent=found.gram.bid_exponent))
        scale = np.abs(plain.gram).max()
        out["plain_bidders"] = int(plain.n_bidders)
        out["gram_rel_diff"] = float(np.abs(found.gram.gram - plain.gram).max() / scale)
        del back
    out["python_rss_end_mib"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    out["load_after"] = os.getloadavg()
    spark.stop()
    return out


def run_route(route: str, args) -> dict:
    """One route in a child process; its CPU and peak RSS from ``os.wait4``."""
    argv = [sys.executable, __file__, "--child", "--route", route, "--bidders", str(args.bidders),
            "--data", str(args.data), "--bids-per-shard", str(args.bids_per_shard)]
    t0 = time.perf_counter()
    proc = subprocess.Popen(argv, stdout=subprocess.PIPE, text=True)
    stdout = proc.stdout.read()
    _, status, usage = os.wait4(proc.pid, 0)
    line = stdout.strip().splitlines()[-1] if stdout.strip() else "{}"
    out = json.loads(line) if line.startswith("{") else {"failed": line}
    out.update(exit=os.waitstatus_to_exitcode(status), wall=time.perf_counter() - t0,
               child_cpu=usage.ru_utime + usage.ru_stime, child_rss_mib=usage.ru_maxrss / 1024)
    return out


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--bidders", type=int, default=8_000_000, help="bids of the day (about as many distinct ids)")
    parser.add_argument("--routes", default="driver,executors")
    parser.add_argument("--route", default="executors")
    parser.add_argument("--data", default=None)
    parser.add_argument("--bids-per-shard", type=int, default=1_000_000)
    parser.add_argument("--child", action="store_true")
    args = parser.parse_args(argv)
    if args.child:
        print(json.dumps(child(args), default=str), flush=True)
        return 0
    args.data = Path(args.data or tempfile.mkdtemp(prefix="bench-spark-bidders-"))
    write_day(args.data, args.bidders)
    print(f"lake day: {args.bidders} bids, {expected_distinct(args.bidders)} distinct bidder ids, in {args.data}")
    for route in args.routes.split(","):
        print(json.dumps(run_route(route, args), default=str), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
