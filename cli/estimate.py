"""``counterbid estimate``: per-arm estimates from a bid log and an experiment spec."""

from __future__ import annotations

import argparse
import json
import os
import sys
import warnings
from pathlib import Path


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--bids", required=True, metavar="PATH", help="Parquet file or folder of the bid log")
    p.add_argument("--experiment", required=True, metavar="PATH", help="experiment spec (YAML)")
    p.add_argument("--experiment-id", metavar="ID", help="which experiment of the spec (needed when it holds several)")
    p.add_argument("--level", type=float, default=0.95, help="confidence level of the intervals (default 0.95)")
    p.add_argument("--cluster", choices=("auto", "auction", "bidder"), default="auto",
                   help="unit of the robust standard errors (default auto: bidder when bidder ids repeat across auctions)")
    p.add_argument("--max-bids-per-shard", type=int, metavar="N", default=None,
                   help="estimate a log with more bids in ceil(bids / N) shards by a stable hash of auction_id, one at a "
                        "time (default: $COUNTERBID_MAX_BIDS_PER_SHARD, else 4000000); memory follows the shard")
    p.add_argument("--engine", choices=("local", "spark"), default="local",
                   help="local: shard by shard in this process (default); spark: Spark reads the log and estimates the "
                        "shards in parallel (needs the spark extra and a Java 17/21 runtime)")
    p.add_argument("--spark-master", metavar="URL", default=None,
                   help="master of the Spark session --engine spark starts (default: $COUNTERBID_SPARK_MASTER, else "
                        "local[*]); settings in $SPARK_CONF_DIR/spark-defaults.conf apply as usual")
    p.add_argument("--format", choices=("table", "json", "csv"), default="table", dest="output_format")


def _choose_experiment(spec_path: str, experiment_id: str | None, bids):
    """The spec's experiment to estimate; ``bids`` is a frame, the log's distinct experiment ids, a function
    returning them (called only when the spec holds several experiments and none is named), or None."""
    from counterbid.estimators import load_experiments
    from counterbid.estimators.errors import InputError

    experiments = load_experiments(spec_path)
    if experiment_id is not None:
        if experiment_id not in experiments:
            raise InputError(f"{spec_path}: no experiment with id {experiment_id!r} (found: {', '.join(experiments)})")
        return experiments[experiment_id]
    if len(experiments) == 1:
        return next(iter(experiments.values()))
    if callable(bids):  # the log's distinct experiment ids, read only now that they are needed
        bids = bids()
    ids = (_distinct_text(bids["experiment_id"]) if "experiment_id" in bids.columns else None) \
        if hasattr(bids, "columns") else bids
    if ids is not None:
        present = [e for e in ids if e in experiments]
        if len(present) == 1:
            return experiments[present[0]]
    raise InputError(f"{spec_path}: holds {len(experiments)} experiments ({', '.join(experiments)}); pass --experiment-id")


def _distinct_text(col) -> list[str]:
    if str(col.dtype) == "category":
        return [str(c) for c in col.cat.remove_unused_categories().cat.categories]
    return list(col.astype("string").dropna().unique())


#: Set: Arrow's allocator as named there (``system``, ``jemalloc``, ``mimalloc``), as Arrow itself reads it.
ARROW_POOL_ENV = "ARROW_DEFAULT_MEMORY_POOL"


def use_system_allocator() -> str:
    """Arrow's buffers from the C library's allocator for this process, unless ``$ARROW_DEFAULT_MEMORY_POOL`` says.

    Called when the log's auction or bidder ids are text: Arrow dictionary-encodes each such column
    with one hash table that grows by reallocation, and under pyarrow's default pool (mimalloc)
    much of that CPU went to the kernel (10M text bids, the two columns read: 4.6-5.4 s system CPU
    against 2.3-2.9 s with the C library's allocator, and a lower peak; docs/scale.md). Integer
    ids keep Arrow's default pool, which faults in fewer pages there. One short-lived command
    owns its process, so it picks the pool; a library function never does. Returns the pool's
    backend name.
    """
    import pyarrow as pa

    if not os.environ.get(ARROW_POOL_ENV):
        pa.set_memory_pool(pa.system_memory_pool())
    return pa.default_memory_pool().backend_name


def run(args: argparse.Namespace) -> int:
    from counterbid.estimators import EstimatorWarning
    from counterbid.estimators.errors import InputError
    from counterbid.readers.engines import LocalEngine, SparkEngine, estimate_bid_log
    from counterbid.readers.shards import distinct_experiment_ids, max_bids_per_shard

    max_bids = max_bids_per_shard(args.max_bids_per_shard, what="--max-bids-per-shard")
    if args.engine == "spark":
        from counterbid.readers.spark_shards import require_pyspark

        require_pyspark()  # before anything is read: one line saying what to install
    local_path = "://" not in args.bids  # Spark also reads object-store URLs
    if local_path and not Path(args.bids).exists():
        raise InputError(f"{args.bids}: no such file or folder")
    # which experiment: the distinct ids only (batch by batch), never the column, and only when the
    # spec holds several experiments and none is named
    experiment = _choose_experiment(args.experiment, args.experiment_id,
                                    (lambda: distinct_experiment_ids(args.bids)) if local_path else None)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", EstimatorWarning)
        if args.engine == "spark":
            from counterbid.readers.spark_shards import spark_session

            engine = SparkEngine(spark_session(args.spark_master))
        else:
            from counterbid.readers.bid_log import text_identity_columns

            if local_path and text_identity_columns(args.bids):
                use_system_allocator()  # before the first column is read
            engine = LocalEngine()  # shard by shard: the same path as the pipeline's estimate step
        result = estimate_bid_log(args.bids, experiment, engine=engine, max_bids_per_shard=max_bids,
                                  confidence_level=args.level, cluster=args.cluster)
    for w in caught:
        if issubclass(w.category, EstimatorWarning):
            print(f"counterbid: warning: {w.message}", file=sys.stderr)
    excluded = result.n_excluded_auctions
    if excluded:
        print(f"counterbid: note: left out {excluded} single-bidder auction(s) of {args.bids}", file=sys.stderr)
    if args.output_format == "json":
        payload = {
            "experiment_id": experiment.id,
            "confidence_level": args.level,
            "cluster": result.cluster,  # the clustering used
            "n_excluded_auctions": excluded,
            "shards": result.shards,
            "engine": result.engine,
            "method_version": result.method_version,
            "payment_rule": result.payment_rule,
            "floor": result.floor,
            "quality": result.quality,
            "segments": dict(result.segments),  # auctions per segment; rows with a null segment are pooled
            "rows": json.loads(result.table.to_json(orient="records")),
        }
        print(json.dumps(payload, indent=2))
    elif args.output_format == "csv":
        sys.stdout.write(result.table.to_csv(index=False))
    else:
        from counterbid.estimators.intervals import POPULATION, format_level, row_clusters

        cluster = result.cluster  # the clustering the run used (not the option's spelling)
        floor = result.floor
        print(f"experiment {experiment.id}: payment rule {result.payment_rule}, "
              f"{'floor ' + format(floor, 'g') if floor else 'no floor'}"
              f"{', ranked by bid x quality' if result.quality else ''}; "
              f"{result.n_auctions} auctions, {result.n_bids} bids"
              f"{' in ' + str(result.shards) + ' shards' if result.shards > 1 else ''}, "
              f"{format_level(result.confidence_level)} intervals clustered by {cluster} "
              f"(they speak for {POPULATION[cluster]})")
        shown = result.to_frame()
        if result.segments:  # pooled rows (every segment together) first, then each segment's
            shown["segment"] = shown["segment"].where(shown["segment"].notna(), "(pooled)")
        else:
            shown = shown.drop(columns="segment")
        shown.insert(shown.columns.get_loc("ci_high") + 1, "cluster", row_clusters(shown["metric"], cluster))
        print(shown.to_string(index=False, float_format=lambda x: f"{x:.6g}"))
        print("Assumes symmetric bidders in equilibrium against the designed shares, known position weights and the"
              " spec's payment rule and floor (each arm's own payment rule does not enter: revenue equivalence);"
              " realized_revenue_per_auction is the realized per-arm average (biased), shown for comparison.")
        if shown["what_if"].any():
            print("Rows with what_if True are layouts that did not run, estimated from the same bids: they also assume"
                  " bidders would respond to such a layout as they would if it ran. effective_share: the share of"
                  " these auctions that, bid for the layout itself, would estimate it as precisely (above 1: the"
                  " mixture's bids say more about it than its own would); status thin_support: no number, the bids"
                  " say too little about the layout (docs/method.md, 'Layouts that did not run').")
    return 0
