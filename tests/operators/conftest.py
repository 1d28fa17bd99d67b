"""Airflow for the operator tests: a throwaway home with SQLite metadata, set before Airflow loads."""

from __future__ import annotations

import atexit
import datetime as dt
import os
import shutil
import tempfile

import pytest

from counterbid.cli.backfill import ensure_metadata, use_isolated_airflow

if "COUNTERBID_TEST_AIRFLOW_HOME" not in os.environ:
    _home = tempfile.mkdtemp(prefix="counterbid-test-airflow-")
    if use_isolated_airflow(_home):
        os.environ["COUNTERBID_TEST_AIRFLOW_HOME"] = _home
        atexit.register(shutil.rmtree, _home, True)
os.environ.setdefault("COUNTERBID_RETRIES", "0")  # a failing test task must not wait for a retry


@pytest.fixture(scope="session")
def airflow_db():
    """The session's Airflow metadata database, migrated once."""
    if "COUNTERBID_TEST_AIRFLOW_HOME" not in os.environ:
        pytest.fail("Airflow was imported before the test home was set; run the DAG tests in their own session")
    ensure_metadata()
    return os.environ["AIRFLOW_HOME"]
