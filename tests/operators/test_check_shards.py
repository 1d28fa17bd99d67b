"""The validate step on a day staged in several shards: counts over the whole day, distributions on shard 0.

Memory is set by a shard: the counting checks (``sample_ratio``, the minimum samples) are exact
over the whole day from DuckDB aggregates, and the distribution checks and the day's bid-quantile
summary load shard 0 alone (a hash sample of whole auctions). Each outcome here is compared with
the frame-based checks of ``counterbid.estimators.checks`` run on the frame they should equal.
"""

from __future__ import annotations

import datetime as dt
import hashlib

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as pads
import pyarrow.parquet as pq
import pytest

from counterbid.dags_example.lake import write_bid_lake
from counterbid.estimators import parse_experiments
from counterbid.estimators.checks import bid_quantile_summary, equilibrium_checks, sample_ratio_check
from counterbid.operators import check_runner, partition
from counterbid.operators.check_runner import read_check_results, run_checks
from counterbid.operators.contract import run_contract
from counterbid.operators.hooks import ResultsHook
from counterbid.operators.lake_hook import LakeHook
from counterbid.operators.staging import StagedPartition
from counterbid.readers.id_hashes import fnv1a_64

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


def _rewrite(path, column, values):
    """Rewrite one staged Parquet file with ``column`` set to ``values`` (added when missing; rows and types kept)."""
    table = pq.read_table(path)
    values = pa.array(values, type=pa.float64())
    where = table.schema.get_field_index(column)
    table = table.append_column(column, values) if where < 0 else table.set_column(where, column, values)
    pq.write_table(table, path)


def test_a_bad_bid_in_the_last_shard_is_named_with_its_auction_and_shard(hook, lake, experiment, tmp_path):
    """The contract runs shard by shard: the outcome is the whole day's, and the offender is named."""
    staged, _ = _staged(hook, lake, experiment, tmp_path)
    last = staged.shards()[-1]
    path = staged.shard(last) / "part-0.parquet"
    victim = pq.read_table(path).column("auction_id")[7].as_py()  # some auction of the last shard
    table = pq.read_table(path)
    _rewrite(path, "bid", [-1.0 if a == victim else b for a, b in zip(table.column("auction_id").to_pylist(),
                                                                       table.column("bid").to_pylist())])
    results = _by_name(partition.run_partition_checks(hook, LakeHook(), experiment=experiment, staged=staged, ds=DAY))
    bad = results["contract_bids_valid"]
    assert not bad.passed and bad.observed == 1.0
    (failure,) = bad.details["failures"]
    assert [x["auction_id"] for x in failure["examples"]] == [victim]
    assert failure["shard"] == str(staged.shard(last) / "*.parquet")
    # the same outcome as the suite on the whole day as one relation (the way the day was checked before)
    with LakeHook().staged_relations(day=staged.day_files) as con:
        whole = _by_name(run_contract(con, "staged_day", experiment))
    assert set(whole) == {n for n in results if n.startswith("contract_")}
    for name, r in whole.items():
        assert (results[name].passed, results[name].observed, results[name].details["checked"]) == \
            (r.passed, r.observed, r.details["checked"]), name
    assert whole["contract_bids_valid"].details["checked"] == len(_frame(staged.day)["auction_id"].unique())
    assert not any(r.passed is False and r.severity == "error" for n, r in results.items() if n != "contract_bids_valid")


def test_a_bad_quality_in_the_last_shard_is_named_with_its_file_and_row(hook, lake, experiment, tmp_path):
    staged, _ = _staged(hook, lake, experiment, tmp_path)
    last = staged.shards()[-1]
    for k in staged.shards():  # every shard gets a quality column; row 11 of the last shard a factor of 0
        rows = pq.read_metadata(staged.shard(k) / "part-0.parquet").num_rows
        _rewrite(staged.shard(k) / "part-0.parquet", "quality", [0.0 if (k == last and i == 11) else 1.0 for i in range(rows)])
    path = staged.shard(last) / "part-0.parquet"
    auction = pq.read_table(path).column("auction_id")[11].as_py()
    results = _by_name(partition.run_partition_checks(hook, LakeHook(), experiment=experiment, staged=staged, ds=DAY))
    assert "schema_quality_positive" in results, [r.describe() for r in results.values() if not r.passed]
    fault = results["schema_quality_positive"]
    assert not fault.passed and fault.observed == 1.0
    assert (fault.details["file"], fault.details["first_row"], fault.details["auction_id"]) == (str(path), 11, str(auction))
    assert fault.details["error"].startswith(f"{path}: column 'quality' row 11 (auction {auction}) is 0.0")


@pytest.fixture(scope="module")
def text_lake(tmp_path_factory, lake):
    """The same two days with text ids (``lot-<n>``, ``seat-<n>``), as logs whose ids are names."""
    root = tmp_path_factory.mktemp("text_lake")
    for path in sorted(lake.rglob("*.parquet")):
        table = pq.read_table(path)
        for name, prefix in (("auction_id", "lot-"), ("bidder_id", "seat-")):
            text = pc.binary_join_element_wise(prefix, pc.cast(table[name], pa.string()), "")
            table = table.set_column(table.schema.get_field_index(name), name, text)
        target = root / path.relative_to(lake)
        target.parent.mkdir(parents=True, exist_ok=True)
        pq.write_table(table, target)
    return root


def test_text_ids_reach_the_sample_checks_as_hashes_with_the_text_frames_outcomes(hook, text_lake, experiment, tmp_path,
                                                                                 monkeypatch):
    # Several fetch batches, each with its own dictionary of ids: the hashes must still agree across them.
    monkeypatch.setattr(check_runner, "FETCH_BATCH_ROWS", 1000)
    staged, out = _staged(hook, text_lake, experiment, tmp_path)
    assert out["shards"] == 3
    results = _by_name(partition.run_partition_checks(hook, LakeHook(), experiment=experiment, staged=staged, ds=DAY))
    k = results["shading"].details["sample"]["shard"]
    text = _frame(staged.shard(k))
    assert text["auction_id"].astype(str).str.startswith("lot-").all() and len(text) > 3000
    on_text = _by_name(equilibrium_checks(text, experiment, ds=DAY))  # the plain route: the text ids themselves
    for name in DISTRIBUTION:
        assert results[name].observed == on_text[name].observed, name
        assert {k: v for k, v in results[name].details.items() if k != "sample"} == dict(on_text[name].details), name
    assert results["auction_dependence"].observed is not None and results["shading"].observed is not None
    # the frame the checks read holds 64-bit hashes of the ids, equal row by row to the hash of each row's text
    frames = []
    with LakeHook().staged_relations(day=staged.day_files, sample=str(staged.shard(k) / "*.parquet")) as con:
        run_checks(con, "staged_day", experiment, ds=DAY, sample_relation="staged_sample", sample_shard=(k, 3),
                   on_bids=frames.append)
    frame = frames[0]
    for name in ("auction_id", "bidder_id"):
        assert str(frame[name].dtype) == "int64"
        by_row = fnv1a_64(pa.array(text[name].astype(str).tolist(), pa.string()))
        assert np.array_equal(frame[name].to_numpy(), by_row), name
    assert frame["auction_id"].nunique() == text["auction_id"].nunique()  # no two auctions met on one hash
    # and the day's stored bid-quantile summary is the text frame's
    summary = pq.read_table(staged.bid_quantiles).to_pandas()
    pd.testing.assert_frame_equal(summary.drop(columns=["experiment_id", "ds"]), bid_quantile_summary(text, experiment))


def test_a_large_sample_shard_is_cut_to_one_auction_in_k(hook, text_lake, experiment, tmp_path, monkeypatch):
    # The distribution checks read at most about MAX_SAMPLE_BIDS bids: a larger sample shard is cut to
    # whole auctions by a hash of the id. Here 4000-bid shards against a 1500-bid budget: 1 auction in 3.
    monkeypatch.setattr(check_runner, "MAX_SAMPLE_BIDS", 1500)
    staged, out = _staged(hook, text_lake, experiment, tmp_path)
    results = _by_name(partition.run_partition_checks(hook, LakeHook(), experiment=experiment, staged=staged, ds=DAY))
    sample = results["shading"].details["sample"]
    every = check_runner.sample_auctions_every(out["day_bids"], out["shards"])
    assert every == sample["auctions_every"] == 3
    shard = _frame(staged.shard(sample["shard"]))
    con = duckdb.connect()
    con.register("shard", shard)
    # the plain cut, in Python: hex digits 9-16 of md5 of the id's text, as an integer, 0 modulo 3
    key = shard["auction_id"].map(lambda a: int(hashlib.md5(str(a).encode()).hexdigest()[8:16], 16))
    cut = shard[(key % 3 == 0).to_numpy()].reset_index(drop=True)
    assert sample["bids_used"] == len(cut) and len(cut) < len(shard) / 2
    on_cut = _by_name(equilibrium_checks(cut, experiment, ds=DAY))
    for name in DISTRIBUTION:
        assert results[name].observed == on_cut[name].observed, name
    for name in COUNTING:  # still the whole day's
        assert "sample" not in results[name].details
    summary = pq.read_table(staged.bid_quantiles).to_pandas()
    pd.testing.assert_frame_equal(summary.drop(columns=["experiment_id", "ds"]), bid_quantile_summary(cut, experiment))


def test_the_sample_cut_follows_the_shard_size():
    n = check_runner.MAX_SAMPLE_BIDS
    assert check_runner.sample_auctions_every(n * 8, 8) == 1  # a shard of the budget: read whole
    assert check_runner.sample_auctions_every(n * 8 + 1, 8) == 2
    assert check_runner.sample_auctions_every(30_000_000, 8) == 2  # 3.75M-bid shards: 1 auction in 2
    assert check_runner.sample_auctions_every(30_000_000, 1) == 15
