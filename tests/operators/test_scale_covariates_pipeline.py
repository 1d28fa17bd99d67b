"""The daily pipeline's steps carry scale covariates: staged with the bids, checked on homogenised bids, estimated.

Real Parquet lake (written by `counterbid simulate`), real staging, the real check runner and a real
DuckDB results file; the stored day equals `estimate_arms` on the day's bids with the covariate.
"""

from __future__ import annotations

import datetime as dt

import pandas as pd
import pyarrow.dataset as pads
import pyarrow.parquet as pq
import pytest
import yaml

from counterbid.cli import main
from counterbid.estimators import estimate_arms, parse_experiments
from counterbid.operators import partition
from counterbid.operators.hooks import ResultsHook
from counterbid.operators.lake_hook import LakeHook
from counterbid.operators.staging import StagedPartition

DAY = dt.date(2026, 5, 4)
SPEC = """experiments:
  - id: awnings
    control_arm: flat
    start: 2026-05-04
    scale_covariates: [footfall]
    arms:
      - {name: flat, share: 0.7, position_weights: [0.4, 0.2, 0.1]}
      - {name: steep, share: 0.3, position_weights: [0.5, 0.15, 0.05]}
"""


@pytest.fixture(scope="module")
def lake(tmp_path_factory):
    root = tmp_path_factory.mktemp("lake")
    spec = root / "spec.yaml"
    spec.write_text(SPEC)
    assert main(["simulate", "--experiment", str(spec), "--out", str(root / "bids"), "--start", DAY.isoformat(),
                 "--auctions-per-day", "4000", "--bidders", "4", "--seed", "8",
                 "--scale-covariate", "footfall:1.0:0.6"]) == 0
    return root


def _run_day(lake, tmp_path, spec_text):
    experiment = parse_experiments(yaml.safe_load(spec_text))["awnings"]
    hook = ResultsHook(database=tmp_path / "results.duckdb", lock_timeout=5)
    partition.stage_partition(LakeHook(), lake_root=lake / "bids", experiment=experiment, ds=DAY,
                              staging_root=tmp_path / "stage")
    staged = StagedPartition.at(tmp_path / "stage", "awnings", DAY)
    results = partition.run_partition_checks(hook, LakeHook(), experiment=experiment, staged=staged, ds=DAY)
    status = partition.record_checks(staged, results)
    return experiment, hook, staged, {r.check: r for r in results}, status


def test_a_day_with_a_declared_covariate_passes_its_checks_and_stores_the_homogenised_estimate(lake, tmp_path):
    experiment, hook, staged, checks, status = _run_day(lake, tmp_path, SPEC)
    assert checks["auction_dependence"].passed, checks["auction_dependence"].details
    assert status in ("ok", "warning"), status
    partition.estimate_partition(hook, experiment=experiment, ds=DAY, staging_root=tmp_path / "stage", run_id="c1")
    got = pq.read_table(staged.estimates_day).to_pandas()
    day = pads.dataset(str(lake / "bids"), format="parquet", partitioning="hive").to_table().to_pandas()
    want = estimate_arms(day.drop(columns=["ds"]), experiment).table
    numbers = ["estimate", "std_error", "ci_low", "ci_high"]
    pd.testing.assert_frame_equal(got[numbers], want[numbers], check_exact=False, rtol=1e-12)
    counts = partition.write_partition(hook, experiment_id="awnings", ds=DAY, staging_root=tmp_path / "stage")
    assert counts["arm_estimates"] == len(want)


def test_the_same_day_without_the_covariate_fails_the_dependence_check(lake, tmp_path):
    _, _, _, checks, status = _run_day(lake, tmp_path, SPEC.replace("    scale_covariates: [footfall]\n", ""))
    dep = checks["auction_dependence"]
    assert not dep.passed and dep.severity == "error" and "scale_covariates" in dep.details["remedy"]
    assert status != "ok", status  # the day is not estimated as clean
