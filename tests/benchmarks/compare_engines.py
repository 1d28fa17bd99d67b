"""The Spark engine against the local engine on the same bid log (run by ``make bench``; not a test).

Estimates one simulated log (default 2M bids of the three-arm experiment of ``bench_estimator.py``,
5 bidders per auction, bidder ids repeating across auctions) with both engines in one process,
with several shards (``--max-bids-per-shard``, default 500,000: 4 shards at 2M) and clustering
by bidder:

* local: :func:`counterbid.readers.shards.estimate_bid_log` (DuckDB splits the log, shards
  estimated one after another in this process);
* Spark: :func:`counterbid.readers.spark_shards.estimate_bid_log_on_spark` on a session of
  ``--spark-master`` (default ``local[2]``; settings from ``$SPARK_CONF_DIR`` as usual).

It then compares the two frames cell by cell (in memory, at full double precision): the same rows
and columns in the same order; every non-numeric cell identical; over every numeric cell, the
largest relative difference ``|a - b| / max(|a|, |b|)`` (0 where both are 0; a NaN must be NaN in
both) and the largest absolute one; and the results' fields (shards, clustering, counts).
Prints a markdown section; exits 1 when a non-numeric cell, a NaN, the shape or an attribute
differs, or the largest relative difference exceeds ``--tolerance`` (default 1e-12: both engines
feed the same rows, in the same order, to the same pure estimator per shard, so they should agree
to rounding).

Usage: python tests/benchmarks/compare_engines.py [--data DIR] [--millions 2] [--max-bids-per-shard 500000]
       [--spark-master local[2]] [--tolerance 1e-12]
"""

from __future__ import annotations

import argparse
import math
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from bench_estimator import SPARK_MASTER, SPEC, make_data  # noqa: E402

#: Fields of the results that must agree between the engines (``engine`` names the engine and differs by design).
COMPARED_ATTRS = ("shards", "cluster", "n_auctions", "n_bids", "n_excluded_auctions", "confidence_level",
                  "method_version", "payment_rule", "floor", "quality")


def compare_frames(local, spark) -> dict:
    """Cell-by-cell comparison of two estimate frames.

    Returns
    -------
    dict
        ``max_relative`` (and the row and column where it occurs), ``max_absolute``,
        ``numeric_cells``, ``text_cells``, and ``problems``: every difference that is not a
        rounding difference in a numeric cell (shape, columns, a text cell, a NaN on one side).
    """
    import numpy as np
    import pandas as pd

    problems: list[str] = []
    if list(local.columns) != list(spark.columns):
        problems.append(f"columns differ: {list(local.columns)} vs {list(spark.columns)}")
    if local.shape != spark.shape:
        problems.append(f"shapes differ: {local.shape} vs {spark.shape}")
    if problems:
        return {"problems": problems, "max_relative": math.nan, "max_absolute": math.nan,
                "numeric_cells": 0, "text_cells": 0, "text_differences": 0, "where": ""}
    local, spark = local.reset_index(drop=True), spark.reset_index(drop=True)
    worst, worst_abs, where, numeric_cells, text_cells, text_differences = 0.0, 0.0, "", 0, 0, 0
    for column in local.columns:
        a, b = local[column], spark[column]
        numeric = pd.api.types.is_numeric_dtype(a) and not pd.api.types.is_bool_dtype(a)
        if numeric and pd.api.types.is_numeric_dtype(b):
            x, y = a.to_numpy(dtype=float), b.to_numpy(dtype=float)
            numeric_cells += x.size
            nan_x, nan_y = np.isnan(x), np.isnan(y)
            for i in np.flatnonzero(nan_x != nan_y):
                problems.append(f"row {i} {column}: {x[i]!r} vs {y[i]!r} (NaN on one side)")
            both = ~(nan_x | nan_y)
            diff = np.abs(x[both] - y[both])
            scale = np.maximum(np.abs(x[both]), np.abs(y[both]))
            relative = np.divide(diff, scale, out=np.zeros_like(diff), where=scale > 0)
            if relative.size and relative.max() > worst:
                k = int(np.argmax(relative))
                worst = float(relative[k])
                row = np.flatnonzero(both)[k]
                where = f"row {row} ({local.loc[row, 'arm']}, {local.loc[row, 'metric']}) column {column}"
            worst_abs = max(worst_abs, float(diff.max()) if diff.size else 0.0)
        else:
            text_cells += len(a)
            for i, (u, v) in enumerate(zip(a.tolist(), b.tolist())):
                same = (u == v) or (u is None and v is None) or (
                    isinstance(u, float) and isinstance(v, float) and math.isnan(u) and math.isnan(v))
                if not same:
                    problems.append(f"row {i} {column}: {u!r} vs {v!r}")
                    text_differences += 1
    return {"problems": problems, "max_relative": worst, "max_absolute": worst_abs, "where": where,
            "numeric_cells": numeric_cells, "text_cells": text_cells, "text_differences": text_differences}


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--data", help="folder of the simulated logs (shared with bench_estimator.py; default: temporary)")
    p.add_argument("--millions", type=int, default=2)
    p.add_argument("--max-bids-per-shard", type=int, default=500_000)
    p.add_argument("--cluster", default="bidder", choices=("auto", "auction", "bidder"))
    p.add_argument("--spark-master", default=SPARK_MASTER)
    p.add_argument("--tolerance", type=float, default=1e-12)
    p.add_argument("--exit-zero", action="store_true", help="exit 0 even when the engines differ (the bench's use)")
    args = p.parse_args(argv)

    folder = Path(args.data) if args.data else Path(tempfile.mkdtemp(prefix="counterbid-compare-"))
    folder.mkdir(parents=True, exist_ok=True)
    spec_path = folder / "bench.yaml"
    if not spec_path.exists():
        spec_path.write_text(SPEC)
    path = make_data(folder, args.millions, spec_path, [sys.executable, str(HERE / "bench_estimator.py")])

    from counterbid.estimators import load_experiment
    from counterbid.readers.engines import SparkEngine, estimate_bid_log
    from counterbid.readers.spark_shards import spark_session

    experiment = load_experiment(spec_path)
    options = {"max_bids_per_shard": args.max_bids_per_shard, "cluster": args.cluster}
    t0 = time.perf_counter()
    local_result = estimate_bid_log(path, experiment, **options)
    t1 = time.perf_counter()
    spark = spark_session(args.spark_master)
    t2 = time.perf_counter()
    spark_result = estimate_bid_log(str(path), experiment, engine=SparkEngine(spark), **options)
    t3 = time.perf_counter()
    spark.stop()

    local, on_spark = local_result.table, spark_result.table
    found = compare_frames(local, on_spark)
    attrs_before = len(found["problems"])
    for name in COMPARED_ATTRS:
        if getattr(local_result, name) != getattr(spark_result, name):
            found["problems"].append(f"{name}: {getattr(local_result, name)!r} vs {getattr(spark_result, name)!r}")
    attrs_same = len(found["problems"]) == attrs_before
    if found["max_relative"] > args.tolerance:
        found["problems"].append(f"largest relative difference {found['max_relative']:.3g} above {args.tolerance:g}")
    lines = [
        f"Engine comparison ({args.millions}M bids, max {args.max_bids_per_shard:,} bids per shard: "
        f"{local_result.shards} shards on each engine; cluster={args.cluster}, used "
        f"{local_result.cluster} / {spark_result.cluster}; Spark {args.spark_master}):",
        "",
        f"* {len(local)} rows x {local.shape[1]} columns: {found['numeric_cells']} numeric cells, "
        f"{found['text_cells']} non-numeric cells",
        f"* largest relative difference over every numeric cell: {found['max_relative']:.3g}"
        + (f" at {found['where']}" if found["where"] else "")
        + f"; largest absolute difference {found['max_absolute']:.3g}",
        f"* non-numeric cells identical: {'yes' if found['text_differences'] == 0 else 'NO'}; "
        f"fields ({', '.join(COMPARED_ATTRS)}) identical: {'yes' if attrs_same else 'NO'}",
        f"* wall: local engine {t1 - t0:.1f} s; Spark session start {t2 - t1:.1f} s, Spark engine {t3 - t2:.1f} s",
    ]
    if found["problems"]:
        lines += ["* DIFFERENCES:", *[f"  * {q}" for q in found["problems"][:20]]]
    print("\n".join(lines))
    return 1 if found["problems"] and not args.exit_zero else 0


if __name__ == "__main__":
    sys.exit(main())
