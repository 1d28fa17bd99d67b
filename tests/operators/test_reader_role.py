"""The dashboards' read-only access: a PostgreSQL role from ``counterbid grant-reader``, a DuckDB file opened read-only.

A results database with rows in the estimates, to-date, position-weight and data-check tables;
the reader must see exactly the writer's rows in every table and view of the results schema,
and be refused every insert, update, delete, truncate, create and drop there.
"""

from __future__ import annotations

import datetime as dt
import sys
import uuid
from pathlib import Path
from urllib.parse import urlsplit, urlunsplit

import duckdb
import pytest

from counterbid.cli import main
from counterbid.estimators import CheckResult
from counterbid.estimators.errors import InputError
from counterbid.operators.check_runner import write_check_results
from counterbid.operators.hooks import ResultsHook
from counterbid.operators.results_schema import RESULTS_VIEWS

sys.path.insert(0, str(Path(__file__).parent))
from fault_writer import partition_tables  # noqa: E402  (rows for every estimates table of a day)

sys.path.remove(str(Path(__file__).parent))

DAY = dt.date(2026, 6, 1)


def _fill(hook: ResultsHook) -> None:
    """Two days of rows in the estimates, to-date and position-weight tables, and a day's checks."""
    for k in range(2):
        day = DAY + dt.timedelta(days=k)
        hook.replace_partition(experiment_id="awnings", ds=day, tables=partition_tables("awnings", day, 5, f"run-{k}"))
    checks = [CheckResult("sample_ratio", "error", True, 0.41, 0.001, {"arms": 2}),
              CheckResult("warmup", "warning", False, 1.0, 3.0, {})]
    hook.record_checks(write_check_results, checks, experiment_id="awnings", ds=DAY, run_id="run-0")


def _counts(con, objects) -> dict[str, int]:
    return {name: con.execute(f"select count(*) from main.{name}").fetchone()[0] for name in objects}


@pytest.fixture
def reader_roles(postgres_url, postgres_server):
    """Unique role names (roles are cluster-wide), dropped after the test."""
    import psycopg

    tag = uuid.uuid4().hex[:8]
    role, login = f"dash_read_{tag}", f"dash_user_{tag}"
    yield role, login
    with psycopg.connect(postgres_url, autocommit=True) as con:
        for name in (login, role):
            if con.execute("select 1 from pg_roles where rolname = %s", [name]).fetchone():
                con.execute(f'drop owned by "{name}"')
    with psycopg.connect(postgres_server, autocommit=True) as admin:
        for name in (login, role):
            admin.execute(f'drop role if exists "{name}"')


@pytest.mark.postgres
def test_the_reader_role_reads_every_table_and_view_and_writes_nothing(postgres_url, reader_roles, capsys):
    import psycopg
    from psycopg import errors

    role, login = reader_roles
    writer = ResultsHook(database=postgres_url)
    _fill(writer)
    assert main(["grant-reader", role, "--results", postgres_url]) == 0, capsys.readouterr().err
    first = capsys.readouterr().out
    assert f"role {role} (created)" in first and "write nothing" in first
    assert main(["grant-reader", role, "--results", postgres_url]) == 0  # idempotent
    assert f"role {role} (already existed)" in capsys.readouterr().out

    with psycopg.connect(postgres_url, autocommit=True) as con:
        objects = {name: kind for name, kind in con.execute(
            "select table_name, table_type from information_schema.tables where table_schema = 'main'").fetchall()}
        want = _counts(con, objects)
        con.execute(f'create role "{login}" login in role "{role}"')  # a dashboard's own user
    assert {v for v, _ in RESULTS_VIEWS} <= {n for n, k in objects.items() if k == "VIEW"}
    assert {"arm_estimates", "data_checks", "counterbid_schema"} <= set(objects)
    assert want["arm_estimates"] == 10 and want["data_checks"] == 2 and want["arm_estimates_cumulative"] > 0

    parts = urlsplit(postgres_url)
    as_reader = urlunsplit(parts._replace(netloc=f"{login}@{parts.hostname or ''}"))
    with psycopg.connect(as_reader, autocommit=True) as dash:
        assert _counts(dash, objects) == want  # every table and view, the writer's rows
        for table in (n for n, k in objects.items() if k == "BASE TABLE"):
            column = dash.execute("select column_name from information_schema.columns where table_schema = 'main' "
                                  "and table_name = %s order by ordinal_position limit 1", [table]).fetchone()[0]
            for sql in (f"insert into main.{table} default values",
                        f'update main.{table} set "{column}" = "{column}"',
                        f"delete from main.{table}",
                        f"truncate main.{table}",
                        f"drop table main.{table}"):
                with pytest.raises(errors.InsufficientPrivilege):
                    dash.execute(sql)
        for sql in ("create table main.dash_notes (note text)", "create view main.dash_view as select 1 as one",
                    "drop view main.arm_lift"):
            with pytest.raises(errors.InsufficientPrivilege):
                dash.execute(sql)

    with psycopg.connect(postgres_url, autocommit=True) as con:
        assert _counts(con, objects) == want  # nothing was written
        con.execute("create table main.added_by_a_later_migration (a int)")  # as the writer, like a migration
        con.execute("insert into main.added_by_a_later_migration values (7)")
    with psycopg.connect(as_reader, autocommit=True) as dash:  # default privileges: readable without a new grant
        assert dash.execute("select a from main.added_by_a_later_migration").fetchall() == [(7,)]
        with pytest.raises(errors.InsufficientPrivilege):
            dash.execute("insert into main.added_by_a_later_migration values (8)")


@pytest.mark.postgres
def test_a_superuser_is_refused_as_the_reader_role(postgres_url):
    with pytest.raises(InputError, match="'postgres' is a superuser"):
        ResultsHook(database=postgres_url).grant_reader("postgres")


def test_on_a_duckdb_file_read_only_means_opening_it_read_only(tmp_path, capsys):
    path = tmp_path / "results.duckdb"
    writer = ResultsHook(database=path)
    _fill(writer)
    assert main(["grant-reader", "dash", "--results", str(path)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "has no roles" in err[0] and "read_only=True" in err[0]
    with duckdb.connect(str(path)) as con:
        objects = [r[0] for r in con.execute(
            "select table_name from information_schema.tables where table_schema = 'main'").fetchall()]
        want = _counts(con, objects)
    assert {v for v, _ in RESULTS_VIEWS} <= set(objects) and want["arm_estimates"] == 10
    with duckdb.connect(str(path), read_only=True) as dash:
        assert _counts(dash, objects) == want  # every table and view
        for sql in ("insert into main.arm_estimates select * from main.arm_estimates",
                    "delete from main.data_checks", "create table main.dash_notes (note text)"):
            with pytest.raises(duckdb.InvalidInputException, match="read-only"):
                dash.execute(sql)
