"""The SQL package: every file loads, holds exactly one statement, and identifiers are guarded."""

from __future__ import annotations

import re

import duckdb
import pytest

from counterbid.estimators.errors import InputError
from counterbid.sql import load_sql, quote_identifier, render_sql, sql_names, validate_identifier


def test_every_file_is_one_statement():
    names = sql_names()
    assert "lake_read_partition" in names and "results_insert_arm_estimates" in names
    for name in names:
        placeholders = set(re.findall(r"\{\{\s*(\w+)\s*\}\}", load_sql(name)))  # schema, relation
        text = render_sql(name, **{p: "main" for p in placeholders})
        assert len(duckdb.extract_statements(text)) == 1, name


@pytest.mark.parametrize("bad", ["", "1abc", "a;drop table x", 'x"y', "a b", "a" * 64, None, 3])
def test_bad_identifiers_are_rejected(bad):
    with pytest.raises(InputError, match="letters, digits"):
        validate_identifier(bad, what="schema")
    with pytest.raises(InputError):
        render_sql("results_create_schema", schema=bad)


def test_identifier_is_quoted_so_reserved_words_work():
    assert quote_identifier("select") == '"select"'
    con = duckdb.connect()
    con.execute(render_sql("results_create_schema", schema="select"))
    assert ("select",) in con.execute("select schema_name from information_schema.schemata").fetchall()


def test_placeholders_must_match():
    with pytest.raises(InputError, match="needs identifier 'schema'"):
        render_sql("results_create_schema")
    with pytest.raises(InputError, match="no placeholder 'table'"):
        render_sql("results_create_schema", schema="main", table="x")
    with pytest.raises(InputError, match="no SQL statement"):
        load_sql("no_such_statement")
    with pytest.raises(InputError, match="lowercase"):
        load_sql("../etc/passwd")


def _identifiers(name, dialect):
    from counterbid.sql import has_dialect_file

    text = load_sql(name, dialect) if has_dialect_file(name, dialect) else load_sql(name)
    return {p: "main" for p in set(re.findall(r"\{\{\s*(\w+)\s*\}\}", text))}


def test_every_statement_is_one_statement_in_every_dialect_with_the_same_parameters():
    import sqlglot

    from counterbid.sql import DIALECTS, has_dialect_file, parameter_names, statement

    # Lake, staging and check statements (lake_, bid_log_, staged_, check_, clicks_, bench_) run on an
    # in-memory DuckDB connection only; the rest are what a results sink runs, in every dialect.
    duckdb_only = ("lake_", "bid_log_", "staged_", "check_", "clicks_", "bench_")
    for dialect in DIALECTS:
        names = [n for n in sql_names(dialect) if dialect == "duckdb" or not n.startswith(duckdb_only)]
        assert "results_insert_arm_estimates" in names
        for name in names:
            text = statement(name, dialect=dialect, **_identifiers(name, dialect))
            assert len(sqlglot.parse(text, read=dialect)) == 1, (dialect, name)
            if dialect == "postgres":
                # every '%' is a psycopg parameter marker (a stray one would break the statement's binding)
                assert re.sub(r"%\(\w+\)s", "", text).count("%") == 0, name
                if not has_dialect_file(name, dialect):  # transpiled: the DuckDB source's parameters, renamed
                    source = statement(name, **_identifiers(name, "duckdb"))
                    assert parameter_names(text, dialect="postgres") == parameter_names(source), name


def test_duckdb_parameters_become_psycopg_parameters():
    from counterbid.sql import statement

    text = statement("results_delete_arm_estimates", dialect="postgres", schema="main")
    assert "%(experiment_id)s" in text and "%(ds)s" in text and "$" not in text
    with pytest.raises(InputError, match="dialect must be one of"):
        statement("results_delete_arm_estimates", dialect="oracle", schema="main")
