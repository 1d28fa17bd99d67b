"""The per-(experiment, day) steps against real Parquet files and a real DuckDB results file."""

from __future__ import annotations

import datetime as dt
import json

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.dataset as pads
import pyarrow.parquet as pq
import pytest
import scipy.stats as st

from counterbid.dags_example.lake import write_bid_lake
from counterbid.estimators import (
    CheckResult, estimate_arms, expected_revenue_per_auction, parse_day, parse_experiments, worst_failure,
)
from counterbid.estimators.errors import InputError
from counterbid.estimators import shard_of
from counterbid.operators import partition
from counterbid.operators.check_runner import read_check_results
from counterbid.operators.contract import CONTRACT_CHECKS
from counterbid.operators.hooks import ResultsHook
from counterbid.operators.lake_hook import LakeHook
from counterbid.operators.pipeline import failed_checks_message
from counterbid.operators.schema_gate import schema_gate
from counterbid.operators.staging import StagedPartition

START = dt.date(2026, 3, 2)
SPEC = {"experiments": [{
    "id": "tiles", "control_arm": "plain", "start": "2026-03-02",
    "arms": [{"name": "plain", "share": 0.7, "position_weights": [0.4, 0.2, 0.1]},
             {"name": "bold", "share": 0.3, "position_weights": [0.5, 0.15, 0.05]}]}]}


@pytest.fixture(scope="module")
def experiment():
    return parse_experiments(SPEC)["tiles"]


@pytest.fixture(scope="module")
def lake(tmp_path_factory, experiment):
    root = tmp_path_factory.mktemp("lake")
    write_bid_lake(root / "bids", [experiment], start=START, days=3, auctions_per_day=2000, n_bidders=4, seed=11,
                   clicks_root=root / "clicks")
    return root


@pytest.fixture
def hook(tmp_path):
    return ResultsHook(database=tmp_path / "results.duckdb", lock_timeout=5)


def _lake_day(root, day):
    df = pads.dataset(str(root), format="parquet", partitioning="hive").to_table().to_pandas()
    return df[pd.to_datetime(df["ds"]).dt.date == day].reset_index(drop=True)


def _stage(hook, lake, experiment, tmp_path, day, **kw):
    return partition.stage_partition(LakeHook(), lake_root=lake / "bids", experiment=experiment, ds=day,
                                     staging_root=tmp_path / "stage", **kw)


def _shard_frame(staged, k):
    return pads.dataset(str(staged.shard(k)), format="parquet").to_table().to_pandas()


def test_stage_writes_only_the_day_split_into_shards_by_auction(hook, lake, experiment, tmp_path):
    day = START + dt.timedelta(days=2)
    lake_day = _lake_day(lake / "bids", day)
    out = _stage(hook, lake, experiment, tmp_path, day, max_bids_per_shard=2500)  # 8000 bids: 4 shards
    staged = StagedPartition.at(tmp_path / "stage", "tiles", day)
    assert out["day_bids"] == len(lake_day) == 8000 and out["shards"] == 4 == len(staged.shards())
    frames = {k: _shard_frame(staged, k) for k in staged.shards()}
    assert sum(len(f) for f in frames.values()) == len(lake_day)
    want = dict(zip(lake_day["auction_id"], shard_of(lake_day["auction_id"], 4)))
    for k, f in frames.items():  # whole auctions, each in the shard the estimators' shard_of names
        assert {want[a] for a in f["auction_id"]} == {k}
        assert set(pd.to_datetime(f["ds"]).dt.date) == {day}  # the day only: nothing of earlier days is staged
    assert sorted(p.name for p in staged.folder.iterdir()) == ["day"]  # no to-date copy, no temp files left
    # a rerun with the default shard size replaces the whole folder (one shard now)
    assert _stage(hook, lake, experiment, tmp_path, day)["shards"] == 1 and staged.shards() == [0]
    assert len(_shard_frame(staged, 0)) == len(lake_day)


def test_a_day_partly_behind_a_symbolic_link_is_refused_and_its_earlier_staging_removed(experiment, tmp_path):
    """The lake's recursive glob skips a linked sub-folder: half the day would be staged without a word."""
    write_bid_lake(tmp_path / "bids", [experiment], start=START, days=1, auctions_per_day=300, n_bidders=3, seed=5)
    day = tmp_path / "bids" / f"ds={START}"
    lake_root = tmp_path / "bids"
    out = partition.stage_partition(LakeHook(), lake_root=lake_root, experiment=experiment, ds=START,
                                    staging_root=tmp_path / "stage")
    staged = StagedPartition.at(tmp_path / "stage", "tiles", START)
    assert staged.day.exists() and out["day_bids"] > 0
    files = sorted(day.rglob("*.parquet"))
    table = pads.dataset([str(f) for f in files], format="parquet").to_table()
    for f in files:
        f.unlink()
    half = table.num_rows // 2
    pq.write_table(table.slice(0, half), day / "kept.parquet")
    (tmp_path / "elsewhere").mkdir()
    pq.write_table(table.slice(half), tmp_path / "elsewhere" / "part.parquet")
    (day / "late").symlink_to(tmp_path / "elsewhere", target_is_directory=True)
    assert LakeHook().lake_count_partition(lake_root, experiment_id="tiles", ds=START) == half  # the glob's blind spot
    with pytest.raises(InputError, match="symbolic link") as err:
        partition.stage_partition(LakeHook(), lake_root=lake_root, experiment=experiment, ds=START,
                                  staging_root=tmp_path / "stage")
    assert "\n" not in str(err.value) and f"ds={START}" in str(err.value)
    assert not staged.day.exists()  # the earlier load's staged day does not outlive the refusal


def test_schema_gate_passes_good_data(hook, lake, experiment, tmp_path):
    _stage(hook, lake, experiment, tmp_path, START)
    staged = StagedPartition.at(tmp_path / "stage", "tiles", START)
    results = partition.run_partition_checks(hook, LakeHook(), experiment=experiment, staged=staged, ds=START)
    gate = [r for r in results if r.check.startswith("schema_")]
    assert gate and all(r.passed and r.severity == "error" for r in gate)
    # the full check runner ran after the gate: every contract, experiment and equilibrium check
    ran = {r.check for r in results} - {r.check for r in gate}
    assert ran >= set(CONTRACT_CHECKS) | {"sample_ratio", "min_auctions_per_arm", "min_auctions_per_stratum",
                                         "monotone_values", "shading", "drift", "warmup"}, sorted(ran)
    assert {"schema_rows", "schema_known_arms", "schema_column_bid", "schema_nulls_bid"} <= {r.check for r in gate}
    assert all(r.passed for r in results if r.severity == "error")
    # the experiment's first day is inside its warm-up: a warning, not an error
    assert {r.check for r in results if not r.passed} == {"warmup"}
    assert partition.record_checks(staged, results) == "warning"
    assert partition.load_checks(staged) == "warning"


def _gate_on(hook, experiment, tmp_path, frame):
    staged = StagedPartition.at(tmp_path / "stage", "tiles", START)
    staged.shard(0).mkdir(parents=True, exist_ok=True)
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), staged.shard(0) / "part-0.parquet")
    return staged, schema_gate(LakeHook(), experiment=experiment, staged=staged)


def test_schema_gate_lists_every_failing_column(hook, lake, experiment, tmp_path):
    frame = _lake_day(lake / "bids", START).drop(columns=["bidder_id"])
    frame["ds"] = pd.to_datetime(frame["ds"]).dt.date
    frame["bid"] = frame["bid"].astype(str)  # text bids
    staged, results = _gate_on(hook, experiment, tmp_path, frame)
    failed = {r.check: r for r in results if not r.passed}
    assert set(failed) == {"schema_column_bidder_id", "schema_column_bid"}
    assert failed["schema_column_bid"].details["found"] == "VARCHAR"
    assert failed["schema_column_bidder_id"].details["found"] == "missing"
    message = failed_checks_message(results, where="tiles on 2026-03-02")
    assert message.startswith("2 check(s) failed") and "schema_column_bid " in message and "bidder_id" in message
    assert "observed 0 vs threshold 1" in message
    assert partition.record_checks(staged, results) == "error"
    with pytest.raises(InputError, match="status 'error'"):
        partition.load_checks(staged)
    recorded = json.loads(staged.checks.read_text())
    assert {c["check"] for c in recorded["checks"] if not c["passed"]} == set(failed)


def test_schema_gate_counts_unknown_arms_and_empty_days(hook, lake, experiment, tmp_path):
    frame = _lake_day(lake / "bids", START)
    frame["ds"] = pd.to_datetime(frame["ds"]).dt.date
    frame.loc[frame.index[:7], "arm"] = "mystery"
    _, results = _gate_on(hook, experiment, tmp_path, frame)
    arms = next(r for r in results if r.check == "schema_known_arms")
    assert not arms.passed and arms.observed == 7 and arms.details["unknown_arms"] == ["mystery"]
    _, results = _gate_on(hook, experiment, tmp_path, frame.iloc[:0])
    rows = next(r for r in results if r.check == "schema_rows")
    assert not rows.passed and rows.observed == 0


def test_estimate_matches_estimate_arms_and_write_is_idempotent(hook, lake, experiment, tmp_path):
    day = START + dt.timedelta(days=1)
    _stage(hook, lake, experiment, tmp_path, day)
    staged = StagedPartition.at(tmp_path / "stage", "tiles", day)
    partition.record_checks(staged, schema_gate(LakeHook(), experiment=experiment, staged=staged))
    partition.estimate_partition(hook, experiment=experiment, ds=day, staging_root=tmp_path / "stage", run_id="t1")
    want = estimate_arms(_lake_day(lake / "bids", day), experiment)
    got = pq.read_table(staged.estimates_day).to_pandas()
    # ``status`` is the data checks' here (the estimator's own flags are merged in elsewhere)
    numbers = [c for c in want.table.columns if c != "status"]
    pd.testing.assert_frame_equal(got[numbers], want.table[numbers], check_exact=True)
    welfare = got["metric"] == "welfare_per_auction"  # published without an interval: the estimator's flag
    assert set(got.loc[~welfare, "status"]) == {"ok"} and set(got.loc[welfare, "status"]) == {"no_interval"}
    assert set(got["run_id"]) == {"t1"}
    counts = partition.write_partition(hook, experiment_id="tiles", ds=day, staging_root=tmp_path / "stage", cleanup=False)
    assert {k: counts[k] for k in ("arm_estimates", "arm_estimates_to_date", "position_weights")} == \
        {"arm_estimates": len(want.table), "arm_estimates_to_date": len(want.table), "position_weights": 6}
    assert counts["stratum_pieces"] == 1  # one stratum (4 bidders), one shard
    assert counts["bid_quantiles"] == 0  # the validate step did not run here: no summary to store
    first = hook.fetch_df("report_daily_estimates", {"experiment_id": "tiles"})
    partition.write_partition(hook, experiment_id="tiles", ds=day, staging_root=tmp_path / "stage")
    pd.testing.assert_frame_equal(hook.fetch_df("report_daily_estimates", {"experiment_id": "tiles"}), first)
    assert not staged.folder.exists()  # cleaned up after the commit
    with pytest.raises(InputError, match="run the 'estimate' step"):
        partition.write_partition(hook, experiment_id="tiles", ds=day, staging_root=tmp_path / "stage")


def test_estimate_refuses_a_partition_that_failed_its_checks(hook, lake, experiment, tmp_path):
    _stage(hook, lake, experiment, tmp_path, START)
    with pytest.raises(InputError, match="run the 'validate' step"):
        partition.estimate_partition(hook, experiment=experiment, ds=START, staging_root=tmp_path / "stage", run_id="r")


def test_measured_weights_from_the_click_log_recover_revenue(tmp_path):
    """Bids simulated with known weights; estimated with weights measured from simulated clicks.

    The load step measures the weights once and stages them; the full checks and the estimate
    both use the staged weights. Reference: the arm's revenue in its own equilibrium (Myerson
    1981, Lemma 3), computed by ``expected_revenue_per_auction``; the estimate with measured
    weights must be within 4 SE.
    """
    truth = parse_experiments(SPEC)["tiles"]
    measured = parse_experiments({"experiments": [dict(SPEC["experiments"][0], arms=[
        dict(SPEC["experiments"][0]["arms"][0], position_weights="measured"), SPEC["experiments"][0]["arms"][1]])]})["tiles"]
    values = st.lognorm(0.5, scale=0.8)
    write_bid_lake(tmp_path / "bids", [truth], start=START, days=2, auctions_per_day=20000, n_bidders=4, seed=5,
                   values=values, clicks_root=tmp_path / "clicks")
    hook = ResultsHook(database=tmp_path / "r.duckdb")
    day = START + dt.timedelta(days=1)
    with pytest.raises(InputError, match="needs a click log"):
        partition.stage_partition(LakeHook(), lake_root=tmp_path / "bids", experiment=measured, ds=day, staging_root=tmp_path / "s")
    out = partition.stage_partition(LakeHook(), lake_root=tmp_path / "bids", experiment=measured, ds=day,
                                    staging_root=tmp_path / "s", clicks_root=tmp_path / "clicks", click_window_days=2)
    assert out["measured_arms"] == ["plain"]
    staged = StagedPartition.at(tmp_path / "s", "tiles", day)
    results = partition.run_partition_checks(hook, LakeHook(), experiment=measured, staged=staged, ds=day)
    assert len(results) > len(schema_gate(LakeHook(), experiment=measured, staged=staged))  # the full runner ran
    assert all(r.passed for r in results if r.severity == "error"), [r.describe() for r in results if not r.passed]
    partition.record_checks(staged, results)
    partition.estimate_partition(hook, experiment=measured, ds=day, staging_root=tmp_path / "s", run_id="r")
    weights = pq.read_table(staged.weights).to_pandas()
    plain = weights[weights["arm"] == "plain"]
    assert set(plain["source"]) == {"measured"} and plain["first_click_ds"].iloc[0] == START
    assert plain["weight"].to_numpy() == pytest.approx([0.4, 0.2, 0.1], abs=0.01)
    # the day's rows; the experiment-to-date rows hold no number: both days are inside the default warm-up
    pending = pq.read_table(staged.estimates_to_date).to_pandas()
    assert set(pending["status"]) == {"warming_up,warning"} and pending["estimate"].isna().all()  # warm-up warned
    est = pq.read_table(staged.estimates_day).to_pandas().query("metric == 'revenue_per_auction'").set_index("arm")
    want = expected_revenue_per_auction(values, [0.4, 0.2, 0.1], 4)
    assert abs(est.loc["plain", "estimate"] - want) < 4 * est.loc["plain", "std_error"] + 0.01 * want
    staged.measured_weights.unlink()
    with pytest.raises(InputError, match="run the 'load' step"):
        partition.estimate_partition(hook, experiment=measured, ds=day, staging_root=tmp_path / "s", run_id="r")


def test_active_experiments_and_bad_inputs(tmp_path):
    spec = tmp_path / "spec.yaml"
    spec.write_text("experiments:\n  - id: a\n    start: 2026-03-05\n    end: 2026-03-06\n    arms:\n"
                    "      - {name: x, share: 1.0, position_weights: [1.0]}\n  - id: b\n    arms:\n"
                    "      - {name: x, share: 1.0, position_weights: [1.0]}\n")
    assert partition.active_experiment_ids(spec, "2026-03-04") == ["b"]
    assert partition.active_experiment_ids(spec, "2026-03-06T00:00:00+00:00") == ["a", "b"]
    with pytest.raises(InputError, match="ds: must be a date"):
        parse_day("yesterday")
    with pytest.raises(InputError, match="cannot name a staging folder"):
        StagedPartition.at(tmp_path, "../escape", START)


def test_the_full_check_runner_runs_after_the_gate_and_its_outcomes_are_stored(hook, lake, experiment, tmp_path):
    day = START + dt.timedelta(days=2)
    _stage(hook, lake, experiment, tmp_path, day)
    staged = StagedPartition.at(tmp_path / "stage", "tiles", day)
    results = partition.run_partition_checks(hook, LakeHook(), experiment=experiment, staged=staged, ds=day)
    gate = schema_gate(LakeHook(), experiment=experiment, staged=staged)
    assert [r.check for r in results[: len(gate)]] == [r.check for r in gate]
    later = {r.check for r in results[len(gate):]}
    assert {"sample_ratio", "warmup"} <= later  # statistical checks of the runner, after its contract suite
    partition.store_checks(hook, results, experiment_id="tiles", ds=day, run_id="full")
    with hook.connect(read_only=True) as con:
        stored = read_check_results(con, experiment_id="tiles", ds=day)
    assert sorted(stored["check"]) == sorted(r.check for r in results) and set(stored["run_id"]) == {"full"}
    status = hook.fetch_df("report_day_check_status", {"experiment_id": "tiles"})
    assert status["n_checks"].tolist() == [len(results)]
    assert partition.record_checks(staged, results) == (worst_failure(results) or "ok")


def test_a_results_database_the_recorder_cannot_write_never_fails_the_step(tmp_path, caplog):
    """A ``data_checks`` table of another shape already in the results file: the insert fails for real."""
    hook = ResultsHook(database=tmp_path / "results.duckdb", lock_timeout=0)
    with hook.connect() as con:
        con.execute("create table data_checks (note varchar)")
    results = [CheckResult("sample_ratio", "warning", False, 0.001, 0.01)]
    partition.store_checks(hook, results, experiment_id="tiles", ds=START, run_id="r")  # does not raise
    assert "could not store the check outcomes of tiles on 2026-03-02" in caplog.text
    with hook.connect(read_only=True) as con:  # rolled back: the foreign table is untouched
        assert con.execute("select count(*) from data_checks").fetchone()[0] == 0


def test_a_results_database_locked_by_another_process_never_fails_the_step(tmp_path, caplog):
    import subprocess
    import sys
    import textwrap

    path = tmp_path / "locked.duckdb"
    code = textwrap.dedent(f"""
        import duckdb, time
        con = duckdb.connect({str(path)!r})
        print("locked", flush=True)
        time.sleep(3)
    """)
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True)
    try:
        assert proc.stdout.readline().strip() == "locked"
        hook = ResultsHook(database=path, lock_timeout=0.2)
        partition.store_checks(hook, [], experiment_id="tiles", ds=START, run_id="r")  # does not raise
        assert "could not store the check outcomes" in caplog.text and "Could not set lock" in caplog.text
    finally:
        proc.kill()
        proc.wait(timeout=30)


def test_stored_rows_carry_the_level_clustering_and_merged_status(hook, lake, experiment, tmp_path):
    """What the run used reaches every stored row: level, clustering, and check warning plus estimator flags."""
    from counterbid.estimators import CheckResult

    day = START + dt.timedelta(days=1)
    _stage(hook, lake, experiment, tmp_path, day)
    staged = StagedPartition.at(tmp_path / "stage", "tiles", day)
    # a warning that does not leave the day out of the window (warm-up and drift would)
    warned = CheckResult(check="shading", severity="warning", passed=False, observed=0.2, threshold=0.05, details={})
    assert partition.record_checks(staged, [*schema_gate(LakeHook(), experiment=experiment, staged=staged), warned]) == "warning"

    partition.estimate_partition(hook, experiment=experiment, ds=day, staging_root=tmp_path / "stage", run_id="t1",
                                 confidence_level=0.975, cluster="bidder")
    partition.write_partition(hook, experiment_id="tiles", ds=day, staging_root=tmp_path / "stage")
    for name in ("report_daily_estimates", "report_to_date_estimates"):
        rows = hook.fetch_df(name, {"experiment_id": "tiles"})
        assert set(rows["confidence_level"]) == {0.975}
        realized = rows["metric"] == "realized_revenue_per_auction"
        assert set(rows.loc[realized, "cluster"]) == {"auction"} and set(rows.loc[~realized, "cluster"]) == {"bidder"}
        welfare = rows["metric"] == "welfare_per_auction"  # the estimator's own flag, merged with the check's
        assert set(rows.loc[welfare, "status"]) == {"no_interval,warning"}
        assert set(rows.loc[~welfare, "status"]) == {"warning"}
    # the interval really is the bidder-clustered 97.5 % one
    want = estimate_arms(_lake_day(lake / "bids", day), experiment, confidence_level=0.975, cluster="bidder")
    got = hook.fetch_df("report_daily_estimates", {"experiment_id": "tiles"}).set_index(["arm", "metric"])
    np.testing.assert_array_equal(got.loc[list(zip(want.table["arm"], want.table["metric"])), "ci_high"].to_numpy(), want.table["ci_high"].to_numpy())


def test_rows_of_a_day_whose_bids_move_together_carry_heterogeneous_auctions(hook, lake, experiment, tmp_path):
    """A failed auction_dependence warning adds its own flag to the day's and the to-date rows."""
    from counterbid.estimators import CheckResult

    day = START + dt.timedelta(days=1)
    _stage(hook, lake, experiment, tmp_path, day)
    staged = StagedPartition.at(tmp_path / "stage", "tiles", day)
    dependent = CheckResult(check="auction_dependence", severity="warning", passed=False, observed=0.05,
                            threshold=0.02, details={})
    assert partition.record_checks(staged, [*schema_gate(LakeHook(), experiment=experiment, staged=staged), dependent]) == "warning"
    partition.estimate_partition(hook, experiment=experiment, ds=day, staging_root=tmp_path / "stage", run_id="t1")
    partition.write_partition(hook, experiment_id="tiles", ds=day, staging_root=tmp_path / "stage")
    for name in ("report_daily_estimates", "report_to_date_estimates"):
        rows = hook.fetch_df(name, {"experiment_id": "tiles"})
        welfare = rows["metric"] == "welfare_per_auction"
        assert set(rows.loc[welfare, "status"]) == {"heterogeneous_auctions,no_interval,warning"}
        assert set(rows.loc[~welfare, "status"]) == {"heterogeneous_auctions,warning"}
