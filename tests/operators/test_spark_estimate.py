"""The estimate step on Spark (``estimate_partition(..., spark=)``): Spark must read the bids the load step staged."""

from __future__ import annotations

import datetime as dt

import pytest
import scipy.stats as st

from counterbid.estimators import parse_experiments, simulate_experiment
from counterbid.estimators.errors import InputError
from counterbid.operators import partition
from counterbid.operators.hooks import ResultsHook
from counterbid.operators.lake_hook import LakeHook
from counterbid.operators.staging import StagedPartition

DAY = dt.date(2026, 3, 2)
SPEC = {"experiments": [{"id": "tiles", "control_arm": "plain", "start": "2026-02-20", "arms": [
    {"name": "plain", "share": 0.7, "position_weights": [0.4, 0.2, 0.1]},
    {"name": "bold", "share": 0.3, "position_weights": [0.5, 0.15, 0.05]}]}]}


@pytest.mark.spark
def test_spark_estimate_refuses_a_partition_changed_after_the_load_step(spark, tmp_path):
    """Spark reads the lake again: bids added to the day after it was staged and checked stop the
    step with one line (nothing staged for the write step), where the local engine would estimate
    the staged copy. Without the change, the step's output is the local engine's."""
    exp = parse_experiments(SPEC)["tiles"]
    lake, stage = tmp_path / "bids", tmp_path / "stage"
    day = lake / f"ds={DAY}"
    day.mkdir(parents=True)
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=4, n_auctions=400, rng=4).drop(columns=["ds", "value", "clicks"])
    bids.to_parquet(day / "part-a.parquet", index=False)
    hook = ResultsHook(database=tmp_path / "results.duckdb")
    staged = StagedPartition.at(stage, exp.id, DAY)
    out = partition.stage_partition(LakeHook(), lake_root=lake, experiment=exp, ds=DAY, staging_root=stage, max_bids_per_shard=600)
    partition.record_checks(staged, partition.run_partition_checks(hook, LakeHook(), experiment=exp, staged=staged, ds=DAY))
    assert out["shards"] == 3

    with pytest.raises(InputError, match="`lake_root` is required"):
        partition.estimate_partition(hook, experiment=exp, ds=DAY, staging_root=stage, run_id="r", spark=spark)
    on_spark = partition.estimate_partition(hook, experiment=exp, ds=DAY, staging_root=stage, run_id="r", spark=spark,
                                            lake_root=str(lake))
    local = partition.estimate_partition(hook, experiment=exp, ds=DAY, staging_root=stage, run_id="r")
    assert (on_spark.pop("engine"), local.pop("engine")) == ("spark", "local")
    assert on_spark == local and on_spark["shards"] == 3

    staged.estimates_day.unlink()
    late = simulate_experiment(st.uniform(0, 1), exp, n_bidders=4, n_auctions=20, rng=5, first_auction_id=10**6)
    late.drop(columns=["ds", "value", "clicks"]).to_parquet(day / "part-b.parquet", index=False)
    with pytest.raises(InputError) as caught:
        partition.estimate_partition(hook, experiment=exp, ds=DAY, staging_root=stage, run_id="r", spark=spark,
                                     lake_root=str(lake))
    message = str(caught.value)
    assert "\n" not in message
    assert f"Spark read {len(bids) + 80} bids of experiment 'tiles', the load step staged {len(bids)}" in message
    assert "run the day again from the 'load' step" in message
    assert not staged.estimates_day.exists()  # nothing for the write step
