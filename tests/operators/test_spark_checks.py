"""The load and validate steps on Spark (`operators/spark_checks.py`) against the local route, on real lake days.

Each case writes a Parquet lake, runs the local steps (DuckDB staging, `run_partition_checks`) and the
Spark ones (`record_spark_day`, `run_spark_partition_checks`, Spark local mode) and asks for the same
outcomes: one definition of each rule (shard count, schema gate, 1-in-k sample cut) serves both.
"""

from __future__ import annotations

import datetime as dt
import json
import shutil

import pandas as pd
import pytest

pytest.importorskip("pyspark")  # before any test imports Great Expectations: its Spark support is probed once

from counterbid.dags_example.lake import write_bid_lake  # noqa: E402
from counterbid.estimators import parse_experiments  # noqa: E402
from counterbid.operators import check_runner, partition  # noqa: E402
from counterbid.operators.hooks import ResultsHook  # noqa: E402
from counterbid.operators.lake_hook import LakeHook  # noqa: E402
from counterbid.operators.schema_gate import schema_gate  # noqa: E402
from counterbid.operators.spark_checks import (SparkGateInputs, changed_files, gate_checks,  # noqa: E402
                                               read_spark_day, record_spark_day, run_spark_partition_checks)
from counterbid.operators.staging import StagedPartition  # noqa: E402
from counterbid.readers.spark_lake_day import lake_day_files  # noqa: E402
from counterbid.readers.spark_shards import lake_day_frame  # noqa: E402

pytestmark = pytest.mark.spark

DAY = dt.date(2026, 6, 9)
SPEC = {"experiments": [{
    "id": "kiln", "control_arm": "even", "start": "2026-05-20",
    "arms": [{"name": "even", "share": 0.5, "position_weights": [0.4, 0.2, 0.1]},
             {"name": "steep", "share": 0.5, "position_weights": [0.55, 0.12, 0.03]}]}]}
EXP = parse_experiments(SPEC)["kiln"]
MAX_BIDS = 1500  # 1200 auctions x 4 bidders = 4800 bids: 4 shards


@pytest.fixture
def lake(tmp_path):
    root = tmp_path / "lake"
    write_bid_lake(root, [EXP], start=DAY, days=1, auctions_per_day=1200, n_bidders=4, seed=17)
    return root


def _by_name(results):
    return {r.check: r for r in results}


def _both(spark, lake, tmp_path, max_bids=MAX_BIDS):
    """The local route's checks of the day, then the Spark route's (fresh staging and results for each)."""
    out = {}
    for route in ("local", "spark"):
        stage, hook = tmp_path / f"stage-{route}", ResultsHook(database=tmp_path / f"{route}.duckdb", lock_timeout=5)
        staged = StagedPartition.at(stage, EXP.id, DAY)
        if route == "local":
            loaded = partition.stage_partition(LakeHook(), lake_root=lake, experiment=EXP, ds=DAY, staging_root=stage,
                                               max_bids_per_shard=max_bids)
            results = partition.run_partition_checks(hook, LakeHook(), experiment=EXP, staged=staged, ds=DAY)
        else:
            loaded = record_spark_day(spark, LakeHook(), lake_root=str(lake), experiment=EXP, ds=DAY,
                                      staging_root=str(stage), max_bids_per_shard=max_bids)
            results = run_spark_partition_checks(spark, hook, lake_root=str(lake), experiment=EXP, staged=staged, ds=DAY)
        quantiles = pd.read_parquet(staged.bid_quantiles) if staged.bid_quantiles.exists() else None
        out[route] = (loaded, _by_name(results), quantiles, staged)
    return out


def test_spark_route_gives_the_local_routes_outcomes_on_a_sampled_day(spark, lake, tmp_path, monkeypatch):
    """4 shards of about 1200 bids against a sample budget of 500: 1 auction in 3 of the first shard. The
    same checks with the same outcomes and details, the same sample (bids used) and the same staged summary;
    the load step recorded the shards and bids the local load step staged, and copied no bid."""
    monkeypatch.setattr(check_runner, "MAX_SAMPLE_BIDS", 500)
    both = _both(spark, lake, tmp_path)
    (local_load, local, local_q, _), (spark_load, on_spark, spark_q, staged) = both["local"], both["spark"]
    assert (spark_load["shards"], spark_load["day_bids"]) == (local_load["shards"], local_load["day_bids"]) == (4, 4800)
    assert [p.name for p in staged.day.iterdir()] == ["shards.json"]  # no bid staged
    assert list(on_spark) == list(local) and len(local) > 15
    sample = local["shading"].details["sample"]
    assert sample["auctions_every"] == 3 and sample["bids_used"] < 1200 / 2  # the cut took effect: the test can fail
    for name, want in local.items():
        got = on_spark[name]
        assert (got.severity, got.passed, got.observed, got.threshold) == \
               (want.severity, want.passed, want.observed, want.threshold), name
        if not name.startswith("contract_"):  # the contract lists shard files locally
            assert json.dumps(dict(got.details), sort_keys=True, default=str) == \
                   json.dumps(dict(want.details), sort_keys=True, default=str), name
    pd.testing.assert_frame_equal(spark_q, local_q)


def test_spark_schema_gate_fails_as_the_local_one(spark, lake, tmp_path):
    """A null bidder, an arm outside the spec and a quality factor of 0: the same gate outcomes on both routes."""
    day_file = next((lake / f"ds={DAY}").glob("*.parquet"))
    frame = pd.read_parquet(day_file)
    frame["quality"] = 1.0
    frame["bidder_id"] = frame["bidder_id"].astype(str).astype(object)  # text ids: a null keeps the column's type
    frame.loc[frame.index[7], "bidder_id"] = None
    frame.loc[frame.index[40:44], "arm"] = "sideways"
    frame.loc[frame.index[90], "quality"] = 0.0
    frame.to_parquet(day_file, index=False)
    stage = tmp_path / "stage"
    partition.stage_partition(LakeHook(), lake_root=lake, experiment=EXP, ds=DAY, staging_root=stage, max_bids_per_shard=MAX_BIDS)
    local = _by_name(schema_gate(LakeHook(), experiment=EXP, staged=StagedPartition.at(stage, EXP.id, DAY)))
    shutil.rmtree(stage)
    record_spark_day(spark, LakeHook(), lake_root=str(lake), experiment=EXP, ds=DAY, staging_root=str(stage),
                     max_bids_per_shard=MAX_BIDS)
    manifest = read_spark_day(StagedPartition.at(stage, EXP.id, DAY))
    day = lake_day_frame(spark, str(lake), experiment=EXP, ds=DAY, source="day")
    on_spark = _by_name(gate_checks(SparkGateInputs(spark, day, manifest["columns"]), experiment=EXP))
    assert list(on_spark) == list(local)
    failed = {n for n, r in local.items() if not r.passed}
    assert failed == {"schema_nulls_bidder_id", "schema_known_arms", "schema_quality_positive"}
    for name, want in local.items():
        assert (on_spark[name].passed, on_spark[name].observed) == (want.passed, want.observed), name
    assert on_spark["schema_known_arms"].details == local["schema_known_arms"].details
    # the same faulty bid; Spark names it in the lake's file (row 90), the local route in its staged shard file
    spark_fault, local_fault = on_spark["schema_quality_positive"].details, local["schema_quality_positive"].details
    assert str(spark_fault["auction_id"]) == str(local_fault["auction_id"]) == str(frame.loc[frame.index[90], "auction_id"])
    assert spark_fault["first_row"] == 90 and spark_fault["file"].endswith(day_file.name)


def test_a_missing_partition_is_late_data_and_a_changed_day_is_seen(spark, lake, tmp_path):
    """No folder for the day: the retryable error, naming it, as locally. Then the fingerprint: unchanged on a
    second look, and a file added to the day is named."""
    with pytest.raises(partition.MissingPartitionError, match=r"partition ds=2026-06-10 is missing \(no such folder\)"):
        record_spark_day(spark, LakeHook(), lake_root=str(lake), experiment=EXP, ds=DAY + dt.timedelta(days=1),
                         staging_root=str(tmp_path / "stage"))
    out = record_spark_day(spark, LakeHook(), lake_root=str(lake), experiment=EXP, ds=DAY,
                           staging_root=str(tmp_path / "stage"))
    recorded = read_spark_day(StagedPartition.at(tmp_path / "stage", EXP.id, DAY))["files"]
    assert out["day_bids"] == sum(f["experiment_rows"] for f in recorded) == 4800
    assert changed_files(recorded, lake_day_files(spark, str(lake), experiment=EXP, ds=DAY).fingerprint()) is None
    first = next((lake / f"ds={DAY}").glob("*.parquet"))
    pd.read_parquet(first).head(8).to_parquet(first.with_name("late-part.parquet"), index=False)
    change = changed_files(recorded, lake_day_files(spark, str(lake), experiment=EXP, ds=DAY).fingerprint())
    assert change is not None and change.startswith("1 file(s) added") and "late-part.parquet" in change
