"""A day whose bid log carries ``quality`` through load, validate, estimate and write, on both results sinks.

The staged-file and lake statements run on an in-memory DuckDB connection whatever the results
sink is; before the lake hook was split from the results hook, the quality check's statement was
produced in the sink's dialect and a PostgreSQL sink stopped the day at validate with DuckDB's
parser error. Both sinks must now store the same numbers, equal to ``estimate_arms`` on the day.
"""

from __future__ import annotations

import datetime as dt

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.stats as st

from counterbid.estimators import estimate_arms, parse_experiments, simulate_experiment
from counterbid.operators import partition
from counterbid.operators.hooks import ResultsHook
from counterbid.operators.lake_hook import LakeHook
from counterbid.operators.staging import StagedPartition

DAY = dt.date(2026, 5, 11)
SPEC = {"experiments": [{"id": "stalls", "control_arm": "row", "start": "2026-05-11", "arms": [
    {"name": "row", "share": 0.6, "position_weights": [0.35, 0.2, 0.1]},
    {"name": "grid", "share": 0.4, "position_weights": [0.3, 0.25, 0.2, 0.05]}]}]}
NUMBERS = ["estimate", "std_error", "ci_low", "ci_high"]
COUNTS = ["n_auctions", "n_bids"]


@pytest.fixture(scope="module")
def quality_day(tmp_path_factory):
    """One day of 1,500 auctions of 5 bidders with quality factors in [0.6, 1.3], as a lake partition."""
    exp = parse_experiments(SPEC)["stalls"]
    frame = simulate_experiment(st.lognorm(0.4, scale=1.1), exp, n_bidders=5, n_auctions=1_500, rng=23, ds=DAY,
                                quality=st.uniform(0.6, 0.7))
    bids = frame.drop(columns=["value", "clicks"])
    root = tmp_path_factory.mktemp("quality-lake") / "bids"
    (root / f"ds={DAY}").mkdir(parents=True)
    pq.write_table(pa.Table.from_pandas(bids.drop(columns=["ds"]), preserve_index=False),
                   root / f"ds={DAY}" / "stalls.parquet")
    return exp, bids, root


def _sink(kind: str, tmp_path, request) -> ResultsHook:
    if kind == "duckdb":
        return ResultsHook(database=tmp_path / "results.duckdb", lock_timeout=5)
    return ResultsHook(database=request.getfixturevalue("postgres_url"))


@pytest.mark.parametrize("kind", ["duckdb", pytest.param("postgres", marks=pytest.mark.postgres)])
def test_a_day_with_quality_goes_through_every_step_on_either_sink(kind, quality_day, tmp_path, request):
    exp, bids, root = quality_day
    results, lake = _sink(kind, tmp_path, request), LakeHook()
    stage = tmp_path / "stage"
    partition.stage_partition(lake, lake_root=root, experiment=exp, ds=DAY, staging_root=stage)
    staged = StagedPartition.at(stage, exp.id, DAY)
    checks = partition.run_partition_checks(results, lake, experiment=exp, staged=staged, ds=DAY)
    quality_check = [r for r in checks if r.check == "schema_quality_positive"]
    assert len(quality_check) == 1 and quality_check[0].passed, quality_check  # the check ran, on the lake
    assert not [r.check for r in checks if not r.passed and r.severity == "error"]
    partition.record_checks(staged, checks)
    partition.store_checks(results, checks, experiment_id=exp.id, ds=DAY, run_id="q")
    partition.estimate_partition(results, experiment=exp, ds=DAY, staging_root=stage, run_id="q")
    counts = partition.write_partition(results, experiment_id=exp.id, ds=DAY, staging_root=stage)
    stored = results.fetch_df("report_daily_estimates", {"experiment_id": exp.id})
    assert counts["arm_estimates"] == len(stored) > 0
    # the stored numbers are estimate_arms' on the day's bids (quality included), to 1e-12
    want = estimate_arms(bids, exp).table.set_index(["arm", "metric"]).sort_index()
    got = stored.set_index(["arm", "metric"]).sort_index()
    assert list(got.index) == list(want.index)
    for column in NUMBERS:  # welfare has no interval: NaN on both sides
        pd.testing.assert_series_equal(got[column].astype(float), want[column].astype(float), rtol=1e-12,
                                       check_names=False)
    for column in COUNTS:
        assert got[column].astype("int64").tolist() == want[column].astype("int64").tolist(), column
    # both checks and estimates are stored in the sink (the data_checks rows name this day's checks)
    stored_checks = results.fetch_df("report_day_check_status", {"experiment_id": exp.id})
    assert stored_checks["n_checks"].tolist() == [len(checks)]
