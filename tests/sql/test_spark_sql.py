"""The Spark engine's statements (``sql/*.spark.sql``): one Spark SQL statement each, binding what the engine binds.

No Spark runs here: sqlglot parses the text as Spark SQL, and the ``:name`` parameters it finds
must be exactly the ones :mod:`counterbid.readers.spark_shards` (or, for the contract's statements,
:mod:`counterbid.operators.spark_contract`; for the Spark load and validate steps',
:mod:`counterbid.readers.spark_lake_day` and :mod:`counterbid.operators.spark_checks`) binds (which it checks itself on every call), so a renamed parameter fails here instead of in a Spark job.
"""

from __future__ import annotations

import pytest
import sqlglot

from counterbid.operators.spark_checks import CHECK_STATEMENT_PARAMETERS
from counterbid.operators.spark_contract import CONTRACT_STATEMENT_PARAMETERS
from counterbid.readers.spark_lake_day import DAY_FILES_STATEMENT_PARAMETERS
from counterbid.readers.spark_shards import STATEMENT_PARAMETERS as ENGINE_STATEMENT_PARAMETERS
from counterbid.sql import ENGINE_DIALECTS, dialect_files, load_sql, parameter_names, sql_names, statement

SPARK_NAMES = sql_names("spark")
#: Every Spark statement and its parameters: the engine's and the contract's (no name in both).
STATEMENT_PARAMETERS = (ENGINE_STATEMENT_PARAMETERS | CONTRACT_STATEMENT_PARAMETERS | CHECK_STATEMENT_PARAMETERS
                        | DAY_FILES_STATEMENT_PARAMETERS)


def test_the_engine_runs_every_spark_statement_and_no_other():
    tables = (ENGINE_STATEMENT_PARAMETERS, CONTRACT_STATEMENT_PARAMETERS, CHECK_STATEMENT_PARAMETERS,
              DAY_FILES_STATEMENT_PARAMETERS)
    assert sum(len(t) for t in tables) == len(STATEMENT_PARAMETERS)  # no statement in two tables
    assert ENGINE_DIALECTS == ("spark",)
    assert SPARK_NAMES == dialect_files()["spark"] == sorted(STATEMENT_PARAMETERS)
    # engine statements are never transpiled: a shared DuckDB source has no Spark text
    with pytest.raises(Exception, match="no SQL statement 'bid_log_read_shards' for dialect 'spark'"):
        statement("bid_log_read_shards", dialect="spark")


@pytest.mark.parametrize("name", SPARK_NAMES)
def test_one_spark_statement_with_the_bound_parameters(name):
    text = load_sql(name, "spark")
    parsed = [s for s in sqlglot.parse(text, read="spark") if s is not None]
    assert len(parsed) == 1, name
    assert statement(name, dialect="spark") == text  # no placeholders to fill, nothing rewritten
    assert parameter_names(text, dialect="spark") == set(STATEMENT_PARAMETERS[name])


def test_a_colon_inside_a_literal_is_not_a_parameter():
    assert parameter_names("select ':ds' as x, y from t where z = :ds2", dialect="spark") == {"ds2"}
