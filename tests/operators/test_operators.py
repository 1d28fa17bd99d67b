"""Operators: configuration checked at construction, and executed by a real Airflow run."""

from __future__ import annotations

import datetime as dt
import json

import duckdb
import pandas as pd
import pytest

from counterbid.cli.backfill import run_days
from counterbid.dags_example.lake import write_bid_lake
from counterbid.estimators import load_experiments
from counterbid.estimators.errors import InputError
from counterbid.operators.pipeline import (
    RESULTS_ASSET,
    WRITER_POOL,
    EstimateArmsOperator,
    LoadPartitionOperator,
    ValidatePartitionOperator,
    WriteEstimatesOperator,
)

START = dt.date(2026, 3, 2)
COMMON = {"experiment_id": "tiles", "spec_path": "spec.yaml", "staging_root": "/tmp/stage"}
SPEC_TEXT = """
experiments:
  - id: tiles
    control_arm: plain
    start: 2026-03-02
    arms:
      - {name: plain, share: 0.7, position_weights: [0.4, 0.2, 0.1]}
      - {name: bold,  share: 0.3, position_weights: [0.5, 0.15, 0.05]}
  - id: banners
    control_arm: one
    start: 2026-03-02
    arms:
      - {name: one, share: 0.5, position_weights: [0.3, 0.05]}
      - {name: two, share: 0.5, position_weights: [0.3, 0.25]}
"""


@pytest.mark.parametrize("kwargs, message", [
    ({"results_schema": "main; drop"}, "results_schema must be"),
    ({"confidence_level": 1.5}, "confidence_level"),
    ({"cluster": "session"}, "cluster"),
    ({"staging_root": ""}, "staging_root"),
])
def test_bad_configuration_fails_at_construction(kwargs, message):
    with pytest.raises(InputError, match=message):
        EstimateArmsOperator(task_id="estimate", **{**COMMON, **kwargs})


@pytest.mark.parametrize("level,cluster,message", [
    ("1.5", "auction", "`confidence_level` must be a number in \\(0, 1\\); got '1.5'"),
    ("ninety", "auction", "`confidence_level` must be a number in \\(0, 1\\); got 'ninety'"),
    ("0.9", "session", "`cluster` must be one of .*; got 'session'"),
])
def test_templated_level_and_cluster_are_checked_when_rendered(level, cluster, message):
    """Run parameters arrive as rendered strings: a bad one fails the task without retry, naming it."""
    from airflow.sdk.exceptions import AirflowFailException

    op = EstimateArmsOperator(task_id="estimate", confidence_level="{{ params.confidence_level }}",
                              cluster="{{ params.cluster }}", **COMMON)
    assert {"confidence_level", "cluster"} <= set(op.template_fields)
    op.confidence_level, op.cluster = level, cluster  # what rendering the templates leaves
    with pytest.raises(AirflowFailException, match=message):
        op.execute({"run_id": "r"})


@pytest.mark.parametrize("window", [0, True, 2.5])
def test_bad_click_window_fails_at_construction(window):
    with pytest.raises(InputError, match="click_window_days"):
        LoadPartitionOperator(task_id="load", lake_root="/lake", click_window_days=window, **COMMON)


def test_templated_fields_and_writer_defaults():
    load = LoadPartitionOperator(task_id="load", lake_root="{{ params.lake_root }}", **COMMON)
    assert {"ds", "lake_root", "clicks_root", "spec_path", "staging_root", "experiment_id"} <= set(load.template_fields)
    assert load.ds == "{{ ds }}"
    write = WriteEstimatesOperator(task_id="write", **COMMON)
    assert write.pool == WRITER_POOL and write.outlets == [RESULTS_ASSET]
    assert load.template_fields[-3:] == ("lake_root", "clicks_root", "max_bids_per_shard")
    assert EstimateArmsOperator(task_id="e", **COMMON).template_fields == (*load.template_fields[:-3], "confidence_level", "cluster")
    assert ValidatePartitionOperator(task_id="v", **COMMON).template_fields == load.template_fields[:-3]
    with pytest.raises(InputError, match=r"load: `max_bids_per_shard` must be a whole number of bids >= 1; got 0"):
        LoadPartitionOperator(task_id="load", lake_root="/lake", max_bids_per_shard=0, **COMMON)


def test_a_day_with_bad_bids_fails_validation_and_writes_nothing_for_it(airflow_db, tmp_path, capfd, caplog):
    spec = tmp_path / "spec.yaml"
    spec.write_text(SPEC_TEXT)
    experiments = load_experiments(spec)
    write_bid_lake(tmp_path / "bids", experiments.values(), start=START, days=1, auctions_per_day=1500, n_bidders=4, seed=2)
    bad = tmp_path / "bids" / "ds=2026-03-02" / "tiles.parquet"
    frame = pd.read_parquet(bad)
    frame.loc[frame.index[:5], "arm"] = "mystery"
    frame.drop(columns=["bidder_id"]).to_parquet(bad, index=False)
    conf = {"lake_root": str(tmp_path / "bids"), "spec_path": str(spec), "results_database": str(tmp_path / "r.duckdb"),
            "staging_root": str(tmp_path / "stage"), "clicks_root": ""}
    (run,) = run_days([START], conf=conf)
    states = {(t, i): s for t, i, s, _ in run.tasks}
    assert run.state == "failed"
    tiles, banners = sorted({i for (t, i) in states if t == "experiment.validate"})
    by_exp = {0: "tiles", 1: "banners"}
    assert by_exp[tiles] == "tiles"
    assert states[("experiment.validate", tiles)] == "failed"
    assert states[("experiment.estimate", tiles)] == "upstream_failed"
    assert states[("experiment.write", banners)] == "success"  # the other experiment is unaffected
    with duckdb.connect(conf["results_database"], read_only=True) as con:
        assert con.execute("select distinct experiment_id from arm_estimates").fetchall() == [("banners",)]
    recorded = json.loads((tmp_path / "stage" / "tiles" / "ds=2026-03-02" / "checks.json").read_text())
    assert recorded["status"] == "error"
    # the other experiment's file in the partition has bidder_id, so the lake read fills it with nulls
    assert {c["check"] for c in recorded["checks"] if not c["passed"]} == {"schema_nulls_bidder_id", "schema_known_arms"}
    out = capfd.readouterr()
    text = out.out + out.err
    assert "2 check(s) failed for experiment 'tiles' on 2026-03-02" in text
    assert "schema_known_arms [error] FAILED: observed 5 vs threshold 0" in text
    assert "schema_nulls_bidder_id [error] FAILED: observed" in text
    # the DAG's task-level alert notifier (on_failure_callback) names the experiment, day and checks
    logged = text + caplog.text
    assert "counterbid checks alert" in logged
    alert = logged[logged.index("counterbid checks alert"):]
    assert "tiles" in alert and "2026-03-02" in alert and "schema_known_arms" in alert


def test_airflow_lists_the_provider_and_its_connection_type():
    from airflow.providers_manager import ProvidersManager

    manager = ProvidersManager()
    assert "counterbid" in manager.providers
    assert manager.providers["counterbid"].data["package-name"] == "counterbid"
    types = {c["connection-type"]: c["hook-class-name"] for c in manager.providers["counterbid"].data["connection-types"]}
    assert types == {"counterbid_duckdb": "counterbid.operators.hooks.ResultsHook"}


def test_the_operators_default_connection_is_the_results_hooks():
    # pipeline.py spells the id itself (building the operators leaves the hooks unloaded): the two must agree
    from counterbid.operators import hooks, pipeline

    op = WriteEstimatesOperator(task_id="write_default_conn", **COMMON)
    assert pipeline.DEFAULT_CONN_ID == hooks.DEFAULT_CONN_ID
    assert op.hook().counterbid_conn_id == hooks.DEFAULT_CONN_ID


def test_the_load_task_stages_a_day_without_loading_the_later_steps(tmp_path):
    # a fresh interpreter, as a task process is: the load operator stages the day (its shards and
    # manifest are there) and leaves the estimator's steps, the checks and scipy.stats unloaded
    import subprocess
    import sys

    lake, spec = tmp_path / "bids", tmp_path / "spec.yaml"
    spec.write_text(SPEC_TEXT)
    write_bid_lake(lake, load_experiments(spec).values(), start=START, days=1, auctions_per_day=300, n_bidders=3, seed=5)
    probe = f"""
import sys
from counterbid.operators.pipeline import LoadPartitionOperator
op = LoadPartitionOperator(task_id="load", experiment_id="tiles", spec_path={str(spec)!r},
                           staging_root={str(tmp_path / 'stage')!r}, lake_root={str(lake)!r}, ds="{START}")
out = op.execute({{}})
print(out["day_bids"], out["shards"])
print(",".join(m for m in ("counterbid.operators.partition", "counterbid.operators.check_runner",
                           "counterbid.estimators.checks", "scipy.stats") if m in sys.modules) or "-")
"""
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
    counts, loaded = done.stdout.split("\n")[-3:-1]
    bids, shards = map(int, counts.split())
    assert bids > 0 and shards == 1
    assert sorted(p.name for p in (tmp_path / "stage" / "tiles").glob("ds=*")) == [f"ds={START}"]
    assert loaded == "-"


def test_the_estimate_task_estimates_a_one_shard_day_without_loading_the_checks(tmp_path):
    # a fresh interpreter, as a task process is: the DAG's estimate operator (shard tasks on) estimates a
    # day staged as one shard itself -- no shard task ran -- and leaves the checks, scipy.stats and Great
    # Expectations unloaded
    import subprocess
    import sys

    from counterbid.operators import partition
    from counterbid.operators.hooks import ResultsHook
    from counterbid.operators.lake_hook import LakeHook
    from counterbid.operators.staging import StagedPartition

    lake, spec, stage, results = tmp_path / "bids", tmp_path / "spec.yaml", tmp_path / "stage", tmp_path / "r.duckdb"
    spec.write_text(SPEC_TEXT)
    experiment = load_experiments(spec)["tiles"]
    write_bid_lake(lake, [experiment], start=START, days=1, auctions_per_day=400, n_bidders=3, seed=9)
    partition.stage_partition(LakeHook(), lake_root=lake, experiment=experiment, ds=START, staging_root=stage)
    staged = StagedPartition.at(stage, "tiles", START)
    checks = partition.run_partition_checks(ResultsHook(database=str(results)), LakeHook(), experiment=experiment,
                                            staged=staged, ds=START)
    partition.record_checks(staged, checks)
    probe = f"""
import json, sys
from counterbid.operators.pipeline import EstimateArmsOperator
op = EstimateArmsOperator(task_id="estimate", experiment_id="tiles", spec_path={str(spec)!r}, shard_tasks=True,
                          staging_root={str(stage)!r}, results_database={str(results)!r}, ds="{START}")
print(json.dumps(op.execute({{"run_id": "e1"}})))
print(",".join(m for m in ("counterbid.operators.partition", "counterbid.operators.check_runner",
                           "counterbid.estimators.checks", "scipy.stats", "great_expectations") if m in sys.modules) or "-")
"""
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
    summary, loaded = done.stdout.split("\n")[-3:-1]
    summary = json.loads(summary)
    assert summary["shards"] == 1 and summary["day_bids"] == 1200 and summary["engine"] == "local"
    assert staged.estimates_day.exists() and not (staged.day / "pieces").exists()
    assert loaded == "-"


def test_the_write_task_stores_a_day_without_loading_the_checks(tmp_path):
    # a fresh interpreter, as a task process is: the write operator stores the staged day (every
    # results table its rows) and leaves the partition steps, the checks and scipy.stats unloaded
    import subprocess
    import sys

    from counterbid.operators import partition
    from counterbid.operators.hooks import ResultsHook
    from counterbid.operators.lake_hook import LakeHook
    from counterbid.operators.staging import StagedPartition

    lake, spec, stage, results = tmp_path / "bids", tmp_path / "spec.yaml", tmp_path / "stage", tmp_path / "r.duckdb"
    spec.write_text(SPEC_TEXT)
    experiment = load_experiments(spec)["tiles"]
    write_bid_lake(lake, [experiment], start=START, days=1, auctions_per_day=400, n_bidders=3, seed=9)
    hook = ResultsHook(database=str(results))
    partition.stage_partition(LakeHook(), lake_root=lake, experiment=experiment, ds=START, staging_root=stage)
    staged = StagedPartition.at(stage, "tiles", START)
    checks = partition.run_partition_checks(hook, LakeHook(), experiment=experiment, staged=staged, ds=START)
    partition.record_checks(staged, checks)
    partition.estimate_partition(hook, experiment=experiment, ds=START, staging_root=stage, run_id="w1")
    probe = f"""
import json, sys
from counterbid.operators.pipeline import WriteEstimatesOperator
op = WriteEstimatesOperator(task_id="write", experiment_id="tiles", spec_path={str(spec)!r},
                            staging_root={str(stage)!r}, results_database={str(results)!r}, ds="{START}")
print(json.dumps(op.execute({{}})))
print(",".join(m for m in ("counterbid.operators.partition", "counterbid.operators.check_runner",
                           "counterbid.estimators.checks", "scipy.stats") if m in sys.modules) or "-")
"""
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
    counts, loaded = done.stdout.split("\n")[-3:-1]
    counts = json.loads(counts)
    with duckdb.connect(str(results), read_only=True) as con:
        for table in ("arm_estimates", "stratum_pieces", "stratum_piece_bidder_sums", "bid_quantiles"):
            stored = con.execute(f"select count(*) from {table} where experiment_id = 'tiles'").fetchone()[0]
            assert stored == counts[table] > 0, table
    assert not staged.folder.exists()  # cleaned up after the commit
    assert loaded == "-"
