"""Where the Spark engine's time goes, stage by stage, on one bid log (``counterbid estimate --engine spark``; not a test).

Starts one Spark session (its start is not measured), then runs, each as a Spark job of its own
and each timed from nothing cached:

scan      the columns the engine selects, read and dropped (Spark's ``noop`` sink)
shard     the same with each bid's shard and read-order key (``_with_shards``: the md5 rule)
transfer  the same rows repartitioned by shard and handed to Python workers as Arrow, which only
          count them (the shuffle and the Arrow transfer, no estimate)
full      :func:`counterbid.readers.spark_shards.spark_shard_pieces`, the whole engine

Each stage includes the ones above it. CPU seconds are the user + system time of the whole
process tree (this driver, the JVM, the PySpark daemon and its workers: ``psutil``, live
processes plus what they reaped) over the stage; on a shared machine wall time waits for cores,
CPU time does not. Prints one JSON line per stage with the 1-minute load average and the CPU
split by process: this driver, the JVM, the Python workers (with what their daemon reaped).

With ``--event-log DIR`` Spark also writes its event log there, and after the session stops each
Spark stage's task sums are printed (``spark_event_stages.py``: task run and CPU time, GC time,
shuffle bytes, idle task slots), named by the benchmark stage whose job ran it.

Usage: JAVA_HOME=... python tests/benchmarks/bench_spark_stages.py BIDS.parquet SPEC.yaml [--master local[2]]
       [--stages scan,shard,transfer,full] [--conf KEY=VALUE ...] [--event-log DIR]
"""

from __future__ import annotations

import argparse
import json
import os
import time


def tree_cpu_seconds() -> float:
    """User + system CPU of this process and every descendant (live ones, and those they reaped)."""
    import psutil

    me = psutil.Process()
    total = 0.0
    for proc in [me, *me.children(recursive=True)]:
        try:
            t = proc.cpu_times()
            total += t.user + t.system + t.children_user + t.children_system
        except psutil.NoSuchProcess:
            pass
    return total


def cpu_by_role() -> dict[str, float]:
    """User + system CPU seconds of ``driver`` (this process), ``jvm`` and ``python_workers`` (the rest of the tree)."""
    import psutil

    me = psutil.Process()
    roles = {"driver": 0.0, "jvm": 0.0, "python_workers": 0.0}
    for proc in [me, *me.children(recursive=True)]:
        try:
            t = proc.cpu_times()
            role = "driver" if proc.pid == me.pid else "jvm" if proc.name() == "java" else "python_workers"
            own, reaped = t.user + t.system, t.children_user + t.children_system
        except psutil.NoSuchProcess:
            continue
        roles[role] += own
        # the JVM reaps the PySpark daemon it started, the daemon its workers: reaped time is the workers'
        roles["python_workers" if role != "driver" else "driver"] += reaped
    return roles


def timed(name: str, run, spark=None) -> object:
    """Run ``run()`` (as Spark jobs described as ``name``); print its wall and CPU seconds as one JSON line."""
    if spark is not None:
        spark.sparkContext.setJobDescription(name)
    cpu, wall = cpu_by_role(), time.perf_counter()
    out = run()
    after = cpu_by_role()
    split = {role: round(after[role] - cpu[role], 2) for role in after}
    print(json.dumps({"stage": name, "wall_s": round(time.perf_counter() - wall, 2),
                      "cpu_s": round(sum(split.values()), 2), **{f"cpu_{k}_s": v for k, v in split.items()},
                      "load_1min": round(os.getloadavg()[0], 2)}),
          flush=True)
    return out


def _count_rows(batches):
    """A Python worker's whole job in the transfer stage: count the rows it receives."""
    import pyarrow as pa

    n = 0
    for batch in batches:
        n += batch.num_rows
    yield pa.RecordBatch.from_pydict({"n": [n]})


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("bids")
    p.add_argument("spec")
    p.add_argument("--master", default="local[2]")
    p.add_argument("--stages", default="scan,shard,transfer,full")
    p.add_argument("--conf", action="append", default=[], metavar="KEY=VALUE")
    p.add_argument("--event-log", default=None, metavar="DIR", help="also write Spark's event log here and sum it")
    args = p.parse_args(argv)
    stages = set(args.stages.split(","))
    conf = dict(kv.split("=", 1) for kv in args.conf)
    if args.event_log:
        os.makedirs(args.event_log, exist_ok=True)
        conf.update({"spark.eventLog.enabled": "true", "spark.eventLog.dir": os.path.abspath(args.event_log),
                     "spark.eventLog.compress": "false", "spark.eventLog.rolling.enabled": "false"})

    from counterbid.estimators import BID_COLUMNS, load_experiment, n_shards
    from counterbid.readers import spark_shards as engine
    from counterbid.readers.shards import max_bids_per_shard
    from counterbid.readers.spark_label_codes import coded_label_columns, listed_words

    spark = engine.spark_session(args.master, conf)
    spark.range(1).count()
    experiment = load_experiment(args.spec)
    bids = engine._read_parquet(spark, args.bids, source=args.bids, view="counterbid_stage_bids")
    rows = engine._footer_rows(bids) or bids.count()
    shards = n_shards(rows, max_bids_per_shard(None))
    columns = [c for c in ["experiment_id", *BID_COLUMNS, *experiment.auction_columns] if c in bids.columns]
    print(json.dumps({"bids": rows, "shards": shards, "master": args.master}), flush=True)
    if "scan" in stages:
        timed("scan", lambda: bids.select(*columns, "bid_file", "bid_row").write.format("noop").mode("overwrite").save(),
              spark)
    sharded = engine._with_shards(spark, bids, shards=shards, source=args.bids)
    selected, _ = coded_label_columns(sharded, columns, listed_words(experiment))
    picked = sharded.select(*selected, "shard", "bid_order")
    if "shard" in stages:
        timed("shard", lambda: picked.write.format("noop").mode("overwrite").save(), spark)
    if "transfer" in stages:
        parts = picked.repartition(shards, engine._partition_key(spark, shards))
        timed("transfer", lambda: parts.mapInArrow(_count_rows, "n long").collect(), spark)
    if "full" in stages:
        timed("full", lambda: engine.spark_shard_pieces(spark, bids, experiment, shards=shards, source=args.bids,
                                                       expected_bids=rows), spark)
    app = spark.sparkContext.applicationId
    spark.stop()
    if args.event_log:
        from spark_event_stages import app_log, event_lines, stage_tallies

        cores = int(args.master[len("local["):-1]) if args.master.startswith("local[") and args.master[6:-1].isdigit() \
            else os.cpu_count()
        for tally in stage_tallies(event_lines(app_log(args.event_log, app))):
            print(json.dumps(tally.row(cores)), flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
