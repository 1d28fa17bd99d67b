"""The validate step on a day staged in several shards: counts over the whole day, distributions on shard 0.

Memory is set by a shard: the counting checks (``sample_ratio``, the minimum samples) are exact
over the whole day from DuckDB aggregates, and the distribution checks and the day's bid-quantile
summary load shard 0 alone (a hash sample of whole auctions). Each outcome here is compared with
the frame-based checks of ``counterbid.estimators.checks`` run on the frame they should equal.
"""

from __future__ import annotations

import datetime as dt

import pandas as pd
import pyarrow.dataset as pads
import pyarrow.parquet as pq
import pytest

from counterbid.dags_example.lake import write_bid_lake
from counterbid.estimators import parse_experiments
from counterbid.estimators.checks import bid_quantile_summary, equilibrium_checks, sample_ratio_check
from counterbid.operators import partition
from counterbid.operators.check_runner import read_check_results, run_checks
from counterbid.operators.hooks import ResultsHook
from counterbid.operators.lake_hook import LakeHook
from counterbid.operators.staging import StagedPartition

DAY = dt.date(2026, 5, 4)
SPEC = {"experiments": [{
    "id": "cards", "control_arm": "flat", "start": "2026-04-20",
    "arms": [{"name": "flat", "share": 0.6, "position_weights": [0.4, 0.2, 0.1]},
             {"name": "tall", "share": 0.4, "position_weights": [0.5, 0.15, 0.05]}]}]}
COUNTING = ("sample_ratio", "min_auctions_per_arm", "min_auctions_per_stratum")
DISTRIBUTION = ("monotone_values", "shading", "drift", "auction_dependence")
MAX_BIDS = 4000  # 2 days x 3000 auctions x 4 bidders: 12000 bids a day, 3 shards of about 4000


@pytest.fixture(scope="module")
def experiment():
    return parse_experiments(SPEC)["cards"]


@pytest.fixture(scope="module")
def lake(tmp_path_factory, experiment):
    root = tmp_path_factory.mktemp("lake")
    write_bid_lake(root, [experiment], start=DAY - dt.timedelta(days=1), days=2, auctions_per_day=3000, n_bidders=4,
                   seed=5)
    return root


@pytest.fixture
def hook(tmp_path):
    return ResultsHook(database=tmp_path / "results.duckdb", lock_timeout=5)


def _staged(hook, lake, experiment, tmp_path, max_bids=MAX_BIDS):
    out = partition.stage_partition(LakeHook(), lake_root=lake, experiment=experiment, ds=DAY,
                                    staging_root=tmp_path / "stage", max_bids_per_shard=max_bids)
    return StagedPartition.at(tmp_path / "stage", experiment.id, DAY), out


def _frame(path):
    """Every Parquet file under ``path`` (a shard folder, the staged day, a lake day) as one frame."""
    return pads.dataset(sorted(str(p) for p in path.rglob("*.parquet")), format="parquet").to_table().to_pandas()


def _by_name(results):
    return {r.check: r for r in results}


def test_counting_checks_are_exact_and_distribution_checks_read_shard_zero_only(hook, lake, experiment, tmp_path):
    staged, out = _staged(hook, lake, experiment, tmp_path)
    assert out["shards"] == 3
    day, shard0 = _frame(staged.day), _frame(staged.shard(0))
    assert 0 < len(shard0) < len(day) == out["day_bids"]
    results = _by_name(partition.run_partition_checks(hook, LakeHook(), experiment=experiment, staged=staged, ds=DAY))
    on_day = _by_name(equilibrium_checks(day, experiment, ds=DAY))
    on_shard0 = _by_name(equilibrium_checks(shard0, experiment, ds=DAY))
    for name in COUNTING:  # (a) exact over the whole day
        assert results[name] == on_day[name] and "sample" not in results[name].details
    assert on_day["sample_ratio"].observed != on_shard0["sample_ratio"].observed  # so the check above can fail
    for name in DISTRIBUTION:  # (b) shard 0 alone, and the details say so
        sample = results[name].details["sample"]
        assert (sample["shard"], sample["shards"], sample["day_bids"]) == (0, 3, len(day))
        # (d) the frame the step loaded had shard 0's rows, not the day's
        assert sample["bids_used"] == len(shard0)
        assert results[name].observed == on_shard0[name].observed
        assert {k: v for k, v in results[name].details.items() if k != "sample"} == dict(on_shard0[name].details)
    # ... and shard 0 is not the day: the comparisons above could fail
    assert results["shading"].details["min_ratio_by_bidders"] != on_day["shading"].details["min_ratio_by_bidders"]
    # the day's stored summary is shard 0's too (what tomorrow's drift check compares with)
    summary = pq.read_table(staged.bid_quantiles).to_pandas()
    want = bid_quantile_summary(shard0, experiment)
    pd.testing.assert_frame_equal(summary.drop(columns=["experiment_id", "ds"]), want)
    assert summary.groupby("n_bidders")["n_bids"].first().sum() <= len(shard0)
    # the stored check rows carry the note
    partition.store_checks(hook, list(results.values()), experiment_id="cards", ds=DAY, run_id="r")
    with hook.connect(read_only=True) as con:
        stored = read_check_results(con, experiment_id="cards", ds=DAY).set_index("check")
    assert '"sample": {' in stored.loc["shading", "details"] and '"sample"' not in stored.loc["sample_ratio", "details"]
    status = hook.fetch_df("report_day_check_status", {"experiment_id": "cards"})  # what the report's day column shows
    assert status["n_on_sample"].tolist() == [len(DISTRIBUTION) + 2]  # and outlying_bids, dominant_bids (fences from the sample)


def test_drift_on_shard_zero_against_trailing_summaries(hook, lake, experiment, tmp_path):
    staged, _ = _staged(hook, lake, experiment, tmp_path)
    before = _frame(lake / f"ds={DAY - dt.timedelta(days=1)}")
    history = bid_quantile_summary(before, experiment).assign(ds=DAY - dt.timedelta(days=1))
    with LakeHook().staged_relations(day=staged.day_files, sample=str(staged.shard(0) / "*.parquet")) as con:
        results = _by_name(run_checks(con, "staged_day", experiment, ds=DAY, history_quantiles=history,
                                      sample_relation="staged_sample", sample_shard=(0, 3)))
    want = _by_name(equilibrium_checks(_frame(staged.shard(0)), experiment, ds=DAY, history=history))["drift"]
    assert results["drift"].observed is not None and results["drift"].observed == want.observed
    assert results["drift"].details["by_bidders"] == want.details["by_bidders"]


def test_a_day_with_one_shard_is_checked_whole_as_before(hook, lake, experiment, tmp_path):
    staged, out = _staged(hook, lake, experiment, tmp_path, max_bids=1_000_000)
    assert out["shards"] == 1
    results = _by_name(partition.run_partition_checks(hook, LakeHook(), experiment=experiment, staged=staged, ds=DAY))
    on_day = _by_name(equilibrium_checks(_frame(staged.day), experiment, ds=DAY))
    for name in COUNTING + DISTRIBUTION:
        assert results[name] == on_day[name] and "sample" not in results[name].details


def test_a_sample_ratio_fault_in_every_shard_fails_at_the_whole_day_p_value(hook, lake, experiment, tmp_path):
    staged, _ = _staged(hook, lake, experiment, tmp_path)
    for k in staged.shards():  # lose a quarter of the 'tall' auctions, in every shard
        path = staged.shard(k) / "part-0.parquet"
        rows = pq.read_table(path).to_pandas()
        tall = rows.loc[rows["arm"] == "tall", "auction_id"].unique()
        pq.write_table(pq.read_table(path).filter(pads.field("auction_id").isin(tall[: len(tall) // 4]) == False),  # noqa: E712
                       path)
    day = _frame(staged.day)
    results = _by_name(partition.run_partition_checks(hook, LakeHook(), experiment=experiment, staged=staged, ds=DAY))
    want = sample_ratio_check(day, experiment)
    assert not want.passed and want.observed < 1e-3
    assert results["sample_ratio"] == want
