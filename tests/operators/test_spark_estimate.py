"""The estimate step on Spark (``estimate_partition(..., spark=)``): Spark must read the bids the load step staged."""

from __future__ import annotations

import datetime as dt

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.stats as st

from counterbid.estimators import SimulatedSegment, parse_experiments, simulate_experiment, simulate_segmented_experiment
from counterbid.estimators.errors import InputError
from counterbid.operators import partition
from counterbid.operators.bidder_sum_rows import BIDDER_SUM_SCHEMA
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


# -- the Gram form on: the executors stage today's bidder rows, the driver gets the forms ------------
#: Two invented counters of one market (string seat ids from one small pool: bidders repeat).
COUNTERS = {
    "porch": SimulatedSegment(st.gamma(2.5, scale=0.5), 4, 0.6),
    "cellar": SimulatedSegment(st.lognorm(0.5, scale=1.2), {3: 0.5, 5: 0.5}, 0.4),
}
TWO_DAYS = [DAY, DAY + dt.timedelta(days=1)]


def _counter_spec(segmented: bool):
    entry = {"id": "counters", "control_arm": "plain", "start": "2026-02-20", "checks": {"warmup": {"days": 0}},
             "arms": SPEC["experiments"][0]["arms"]}
    return parse_experiments({"experiments": [{**entry, "segments": ["counter"]} if segmented else entry]})["counters"]


def _counter_lake(root, exp, segmented: bool):
    for k, day in enumerate(TWO_DAYS):
        if segmented:
            bids = simulate_segmented_experiment(COUNTERS, exp, n_auctions=500, rng=30 + k, column="counter",
                                                 bidder_pool=120, first_auction_id=10_000 * k)
        else:
            bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders={4: 0.5, 6: 0.5}, n_auctions=500, rng=30 + k,
                                       bidder_pool=120, first_auction_id=10_000 * k)
        bids = bids.drop(columns=[c for c in ("ds", "value", "clicks") if c in bids.columns])
        bids["bidder_id"] = "seat-" + bids["bidder_id"].astype(str)
        (root / f"ds={day}").mkdir(parents=True)
        bids.to_parquet(root / f"ds={day}" / "counters.parquet", index=False)


def _sorted_rows(table: pa.Table) -> pd.DataFrame:
    """The rows in a set order; a list column (the window's label totals) becomes one float column per entry."""
    frame = table.to_pandas().drop(columns=["run_id", "computed_at"], errors="ignore")
    for name in [f.name for f in table.schema if pa.types.is_list(f.type) or pa.types.is_large_list(f.type)]:
        if name in frame:
            spread = pd.DataFrame(np.vstack(frame[name].to_numpy()) if len(frame) else np.empty((0, 0)),
                                  index=frame.index).add_prefix(f"{name}[").add_suffix("]")
            frame = pd.concat([frame.drop(columns=[name]), spread.astype(float)], axis=1)
    keys = [c for c in frame.columns if not pd.api.types.is_float_dtype(frame[c])]
    return frame.sort_values(keys, na_position="first").reset_index(drop=True)


@pytest.mark.spark
@pytest.mark.parametrize("segmented", [False, True], ids=["pooled", "segmented"])
def test_spark_executors_stage_the_bidder_rows_the_local_route_stages(spark, tmp_path, segmented):
    """Clustered by bidder, bidders repeating across shards and days (and segments): on Spark the
    pieces reach the driver without bidder sums, the executors stage the day's
    ``stratum_piece_bidder_sums`` rows (one file per shard, the local route's columns and types), and
    the day's rows, the to-date rows (day 2 extends the running window from the staged rows) and
    the window's staged update equal the local route's to 1e-9 relative."""
    exp = _counter_spec(segmented)
    lake = tmp_path / "bids"
    _counter_lake(lake, exp, segmented)
    staged_rows, summaries = {}, {}
    for engine in ("local", "spark"):
        stage, hook = tmp_path / f"stage-{engine}", ResultsHook(database=tmp_path / f"{engine}.duckdb")
        for day in TWO_DAYS:
            staged = StagedPartition.at(stage, exp.id, day)
            out = partition.stage_partition(LakeHook(), lake_root=lake, experiment=exp, ds=day, staging_root=stage,
                                            max_bids_per_shard=900)
            assert out["shards"] == 3
            partition.record_checks(staged, partition.run_partition_checks(hook, LakeHook(), experiment=exp,
                                                                           staged=staged, ds=day))
            summary = partition.estimate_partition(hook, experiment=exp, ds=day, staging_root=stage, run_id="r",
                                                   cluster="bidder", **({"spark": spark, "lake_root": str(lake)}
                                                                        if engine == "spark" else {}))
            summaries.setdefault(engine, []).append({k: v for k, v in summary.items() if k != "engine"})
            sums = staged.folder / "stratum_piece_bidder_sums.parquet"
            if engine == "spark":  # the executors' files, one per shard; nothing else in the folder
                assert sums.is_dir() and sorted(p.name for p in sums.glob("part-*")) == [
                    f"part-{k:05d}.parquet" for k in range(3)]
                assert pq.read_schema(next(sums.glob("part-*"))).equals(BIDDER_SUM_SCHEMA)
            tables = {name: pq.read_table(staged.folder / f"{name}.parquet") for name in
                      ("stratum_piece_bidder_sums", "stratum_pieces", "bidder_window_totals", "bidder_window_gram")}
            tables["day"], tables["to_date"] = pq.read_table(staged.estimates_day), pq.read_table(staged.estimates_to_date)
            staged_rows[(engine, day)] = {name: _sorted_rows(t) for name, t in tables.items()}
            partition.write_partition(hook, experiment_id=exp.id, ds=day, staging_root=stage)
    assert summaries["spark"] == summaries["local"]
    assert [s["bidder_window"] for s in summaries["spark"]] == ["rebuilt", "extended"]
    for day in TWO_DAYS:
        local, on_spark = staged_rows[("local", day)], staged_rows[("spark", day)]
        assert local["stratum_pieces"]["n_distinct_bidders"].min() > 0
        if segmented:
            assert set(local["day"]["segment"].dropna()) == set(COUNTERS)
        for name, want in local.items():
            got = on_spark[name]
            assert list(got.columns) == list(want.columns) and len(got) == len(want) > 0, name
            for col in want.columns:
                if pd.api.types.is_float_dtype(want[col]):
                    np.testing.assert_allclose(got[col].to_numpy(float), want[col].to_numpy(float), rtol=1e-9,
                                               atol=0, err_msg=f"{name}.{col}")
                else:
                    pd.testing.assert_series_equal(got[col], want[col], check_dtype=False, obj=f"{name}.{col}")
    with duckdb.connect(str(tmp_path / "spark.duckdb"), read_only=True) as con:
        stored = con.execute("select count(*) from stratum_piece_bidder_sums").fetchone()[0]
    assert stored == sum(len(staged_rows[("spark", d)]["stratum_piece_bidder_sums"]) for d in TWO_DAYS)
