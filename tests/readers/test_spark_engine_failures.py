"""A failure of the Spark engine while the executors stage the bidder sums reads as its cause, in one line.

The worker of a shard runs out of memory, or dies: the step's error names that (out of memory in
a Python worker; an executor or Python worker lost), never a line about the input such as "no
shard holds bids". The failures are real ones of a real ``local[2]`` session: the bidder-rows sink
that the estimate step hands the executors raises ``MemoryError`` or ends its process.
"""

from __future__ import annotations

import datetime as dt
import os

import pytest
import scipy.stats as st

from counterbid.estimators import parse_experiments, simulate_experiment
from counterbid.readers.spark_shards import EngineFailure, lake_partition_pieces_on_spark

pytestmark = pytest.mark.spark

DAY = dt.date(2026, 4, 7)
SPEC = {"experiments": [{"id": "lanterns", "control_arm": "dim", "start": "2026-04-01", "arms": [
    {"name": "dim", "share": 0.5, "position_weights": [0.4, 0.2, 0.1]},
    {"name": "bright", "share": 0.5, "position_weights": [0.45, 0.2, 0.06]}]}]}


@pytest.fixture(scope="module")
def lake(tmp_path_factory):
    exp = parse_experiments(SPEC)["lanterns"]
    root = tmp_path_factory.mktemp("lake") / "bids"
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=4, n_auctions=300, rng=12, bidder_pool=40)
    (root / f"ds={DAY}").mkdir(parents=True)
    bids.drop(columns=["ds", "value", "clicks"]).to_parquet(root / f"ds={DAY}" / "lanterns.parquet", index=False)
    return exp, root


def _run(spark, lake, sink):
    exp, root = lake
    return lake_partition_pieces_on_spark(spark, str(root), experiment=exp, ds=DAY, shards=2, cluster="bidder",
                                          bidder_rows_sink=sink, source="lanterns day")


def test_a_worker_out_of_memory_is_named_as_such(spark, lake):
    def exhausted(shard, pieces):  # nested: pickled by value for the workers
        raise MemoryError(f"no room for the bidder rows of shard {shard}")

    with pytest.raises(EngineFailure) as caught:
        _run(spark, lake, exhausted)
    line = str(caught.value)
    assert "\n" not in line
    assert line.startswith("lanterns day: the Spark engine failed: out of memory in a Python worker"), line
    assert "no room for the bidder rows" in line and "no shard" not in line


def test_a_lost_worker_is_named_as_such(spark, lake):
    def vanishes(shard, pieces):
        os._exit(7)

    with pytest.raises(EngineFailure) as caught:
        _run(spark, lake, vanishes)
    line = str(caught.value)
    assert "\n" not in line
    assert "the Spark engine failed: an executor or Python worker was lost" in line, line
    assert "no shard" not in line


def test_the_session_still_estimates_after_the_failures(spark, lake, tmp_path):
    """The same session, after both failures: the sink stores every shard's rows, the pieces come
    without per-bidder arrays and the day's form counts the day's distinct bidders."""
    seen = tmp_path / "rows"
    seen.mkdir()

    def keeps(shard, pieces):
        (seen / f"{shard}.txt").write_text(str(sum(p.bidder_ids.size for p in pieces)))

    found = _run(spark, lake, keeps)
    assert found.gram is not None and all(p.bidder_ids is None for p in found.pieces)
    assert sorted(int(p.stem) for p in seen.glob("*.txt")) == sorted({p.shard for p in found.pieces})
    assert 0 < found.gram.n_bidders <= 40
