"""Fixtures for the SQL tests: a small simulated lake on disk and a results database."""

from __future__ import annotations

import atexit
import datetime as dt
import os
import shutil
import tempfile

import pytest

from counterbid.cli.backfill import use_isolated_airflow
from counterbid.dags_example.lake import write_bid_lake

if "COUNTERBID_TEST_AIRFLOW_HOME" not in os.environ:  # the hook imports Airflow: keep it off ~/airflow
    _home = tempfile.mkdtemp(prefix="counterbid-test-airflow-")
    if use_isolated_airflow(_home):
        os.environ["COUNTERBID_TEST_AIRFLOW_HOME"] = _home
        atexit.register(shutil.rmtree, _home, True)
os.environ.setdefault("COUNTERBID_RETRIES", "0")  # a failing test task must not wait for a retry
from counterbid.estimators import parse_experiments

START = dt.date(2026, 3, 2)
SPEC = {
    "experiments": [
        {
            "id": "tiles",
            "control_arm": "plain",
            "start": "2026-03-02",
            "arms": [
                {"name": "plain", "share": 0.7, "position_weights": [0.4, 0.2, 0.1]},
                {"name": "bold", "share": 0.3, "position_weights": [0.5, 0.15, 0.05]},
            ],
        },
        {
            "id": "banners",
            "control_arm": "one",
            "arms": [
                {"name": "one", "share": 0.5, "position_weights": [0.3]},
                {"name": "two", "share": 0.5, "position_weights": [0.3, 0.3]},
            ],
        },
    ]
}


@pytest.fixture(scope="session")
def experiments():
    return parse_experiments(SPEC)


@pytest.fixture(scope="session")
def small_lake(tmp_path_factory, experiments):
    """Five days, two experiments, with a click log."""
    root = tmp_path_factory.mktemp("lake")
    write_bid_lake(root / "bids", experiments.values(), start=START, days=5, auctions_per_day=300,
                   n_bidders=4, seed=3, clicks_root=root / "clicks")
    return root


@pytest.fixture
def hook(tmp_path):
    from counterbid.operators.hooks import ResultsHook

    return ResultsHook(database=tmp_path / "results.duckdb", lock_timeout=5)


@pytest.fixture
def lake():
    """In-memory DuckDB reads of the lake and staged files (the same whatever the results sink)."""
    from counterbid.operators.lake_hook import LakeHook

    return LakeHook()
