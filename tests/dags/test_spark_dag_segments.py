"""The daily DAG on Spark with bidder clustering on a segmented experiment whose bidders repeat.

The Spark estimate task's executors stage the day's per-bidder rows and only the Gram forms (pooled
and one per segment) reach the driver; the write step stores the staged rows and the running window
is extended from them. Every stored row, the day's and the experiment-to-date's, equals the local
engine's to 1e-9 relative.
"""

from __future__ import annotations

import pytest
import scipy.stats as st
import yaml

from counterbid.cli.backfill import run_days
from counterbid.estimators import SimulatedSegment, parse_experiments, simulate_segmented_experiment

from .test_spark_dag import DAYS, ESTIMATE_TABLES, SPEC, _estimate_summaries, _largest_relative_difference, _stored
from .test_spark_dag import spark_engine  # noqa: F401  (fixture)

pytestmark = pytest.mark.spark

#: Two invented aisles of one market; seat ids from one pool of 150, shared by both aisles.
AISLES = {
    "front": SimulatedSegment(st.gamma(2.0, scale=0.6), 4, 0.55),
    "back": SimulatedSegment(st.lognorm(0.6, scale=1.1), {3: 0.5, 5: 0.5}, 0.45),
}
SEGMENTED = {"experiments": [{**SPEC["experiments"][0], "segments": ["aisle"]}]}


def test_spark_engine_stores_the_local_engines_rows_segmented(spark_engine, airflow_db, tmp_path):  # noqa: F811
    spec = tmp_path / "spec.yaml"
    spec.write_text(yaml.safe_dump(SEGMENTED))
    experiment = parse_experiments(SEGMENTED)["tiles"]
    for k, day in enumerate(DAYS):
        bids = simulate_segmented_experiment(AISLES, experiment, n_auctions=600, rng=90 + k, column="aisle",
                                             bidder_pool=150, first_auction_id=10_000 * k)
        bids = bids.drop(columns=[c for c in ("ds", "value", "clicks") if c in bids.columns])
        bids["bidder_id"] = "seat-" + bids["bidder_id"].astype(str)
        (tmp_path / "bids" / f"ds={day}").mkdir(parents=True)
        bids.to_parquet(tmp_path / "bids" / f"ds={day}" / "tiles.parquet", index=False)
    conf = {"lake_root": str(tmp_path / "bids"), "spec_path": str(spec), "staging_root": str(tmp_path / "stage"),
            "clicks_root": "", "max_bids_per_shard": "900"}  # about 2 400 bids a day: 3 shards
    results, routes = {}, {}
    for engine in ("local", "spark"):
        spark_engine(engine)
        results[engine] = tmp_path / f"{engine}.duckdb"
        runs = run_days(DAYS, conf={**conf, "results_database": str(results[engine])})
        assert [r.state for r in runs] == ["success"] * len(DAYS), [r.line() for r in runs]
        summaries = _estimate_summaries(DAYS)
        assert [(s["engine"], s["shards"]) for s in summaries] == [(engine, 3)] * len(DAYS)
        routes[engine] = [s["bidder_window"] for s in summaries]
    assert routes["spark"] == routes["local"] == ["rebuilt", "extended"]  # day 2: today's bidders only
    local, spark = _stored(results["local"]), _stored(results["spark"])
    assert len(local["stratum_piece_bidder_sums"]) > 0 and set(local["stratum_piece_bidder_sums"]["segment"]) == set(AISLES)
    assert set(local["arm_estimates_to_date"]["segment"].dropna()) == set(AISLES)
    to_date = local["arm_estimates_to_date"]
    assert set(to_date[to_date["metric"] == "revenue_per_auction"]["cluster"]) == {"bidder"}
    for name in ESTIMATE_TABLES:
        _largest_relative_difference(spark[name], local[name], name)
