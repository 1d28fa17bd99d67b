"""The Spark estimate step at millions of distinct bidder ids, under the default driver settings (slow).

A 2.5M-bid day whose bidder ids are distinct text but for every tenth bid, clustered by bidder,
through the step's Spark route in a child process whose session sets no ``spark.driver.memory``
(Spark's default driver heap): it completes, no piece reaches the driver with per-bidder arrays,
the executors' Gram form counts every distinct bidder and equals the plain formula (the form of
the per-bidder totals read back from the staged rows) to 1e-12 relative to its largest entry.
"""

from __future__ import annotations

import argparse

import pytest

from .bench_spark_bidder_window import expected_distinct, run_route, write_day

BIDS = 2_500_000


@pytest.mark.slow
@pytest.mark.spark
@pytest.mark.timeout(2400)
def test_millions_of_bidders_reach_the_driver_as_small_forms(tmp_path, java_home, monkeypatch):
    monkeypatch.setenv("JAVA_HOME", java_home)
    write_day(tmp_path, BIDS)
    args = argparse.Namespace(bidders=BIDS, data=tmp_path, bids_per_shard=1_000_000)
    out = run_route("executors", args)
    print(f"\n{out}")
    assert out["exit"] == 0 and "failed" not in out, out
    assert out["driver_memory"] is None  # the default driver heap
    assert out["shards"] == 3 and out["pieces"] >= 3
    assert out["pieces_with_arrays"] == 0  # nothing per bidder on the driver
    assert out["gram_bidders"] == out["plain_bidders"] == expected_distinct(BIDS) > 2_000_000
    assert out["gram_rel_diff"] <= 1e-12
    assert out["staged_rows"] >= expected_distinct(BIDS) * 3  # every bidder's row of each revenue label
