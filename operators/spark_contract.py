"""The bids data contract on a Spark DataFrame: the same Great Expectations suites, run on the executors.

The local route (:func:`counterbid.operators.contract.run_contract`) validates two small pandas
frames fetched from DuckDB. Here the same two suites (:func:`~counterbid.operators.contract.build_suites`,
defined once) run through Great Expectations' Spark data source:

* the schema suite on a one-row frame of the day's column types, Spark's types written as the
  DuckDB type names the suite's patterns accept (:func:`duckdb_type_name`);
* the per-auction suite on the Spark DataFrame of one row per auction
  (``sql/spark_contract_auction_aggregates.spark.sql``), computed and validated on the executors.

The day is never collected to the driver: what comes back is each expectation's counts and its
first offending auction ids. Check names, severities and the shape of the details are the local
route's (:func:`~counterbid.operators.contract._fold`). The counting checks' input, auctions per
arm and number of bidders, comes back as a small frame (:func:`spark_auction_counts`).

Needs the ``spark`` extra; ``pyspark`` is imported when a function runs, not with this module.
"""

from __future__ import annotations

import re
import sys
from collections.abc import Mapping
from typing import Any

import pandas as pd

from counterbid.estimators.checks import CheckResult, check_config
from counterbid.estimators.errors import InputError
from counterbid.estimators.spec import Experiment
from counterbid.sql import statement

from .contract import CONTRACT_CHECKS, _RESULT_FORMAT, _context, _fold, _gx, _validate, build_suites

__all__ = ["CONTRACT_STATEMENT_PARAMETERS", "duckdb_type_name", "lake_day_on_spark", "run_contract_on_spark",
           "spark_auction_counts"]

#: The view the statements read: the day's bids, with a ``quality`` column.
BIDS_VIEW = "counterbid_contract_bids"

#: Every statement this module runs (``sql/<name>.spark.sql``) and the ``:name`` parameters it binds.
CONTRACT_STATEMENT_PARAMETERS = {
    "spark_contract_auction_aggregates": frozenset({"floor", "tie_tolerance"}),
    "spark_contract_auction_counts": frozenset(),
}

#: Spark's simple type names and the DuckDB names of the same types (what the suite's patterns match).
_SPARK_TO_DUCKDB = {
    "string": "VARCHAR", "double": "DOUBLE", "float": "FLOAT", "bigint": "BIGINT", "int": "INTEGER",
    "smallint": "SMALLINT", "tinyint": "TINYINT", "boolean": "BOOLEAN", "binary": "BLOB", "date": "DATE",
    "timestamp": "TIMESTAMP WITH TIME ZONE", "timestamp_ntz": "TIMESTAMP",
}
_DECIMAL = re.compile(r"^decimal\((\d+),(\d+)\)$")


def duckdb_type_name(spark_type: str) -> str:
    """The DuckDB name of a Spark type given by its simple string (``bigint`` -> ``BIGINT``).

    Parameters
    ----------
    spark_type : str
        ``DataType.simpleString()`` of a column (``string``, ``decimal(18,2)``, ``array<int>``, ...).

    Returns
    -------
    str
        The DuckDB type name, so that the contract's one set of type patterns serves both routes;
        a type without a DuckDB counterpart comes back upper-cased, which no pattern accepts.
    """
    found = _DECIMAL.match(spark_type)
    if found:
        return f"DECIMAL({found.group(1)},{found.group(2)})"
    return _SPARK_TO_DUCKDB.get(spark_type, spark_type.upper())


def _gx_with_spark():
    """Great Expectations with its Spark support: pyspark imported first (GE probes for it once, at import)."""
    import pyspark  # noqa: F401

    if "great_expectations" in sys.modules:
        from great_expectations.compatibility import pyspark as gx_pyspark
        from great_expectations.compatibility.not_imported import NotImported

        if isinstance(gx_pyspark.pyspark, NotImported):
            raise InputError("the contract on Spark needs Great Expectations imported after pyspark; this process "
                             "imported it without Spark support (run the Spark validate step in its own process)")
    return _gx()


def _run_sql(spark, name: str, **args):
    """Spark's frame of ``sql/<name>.spark.sql`` with ``args`` bound (exactly its parameters)."""
    if set(args) != CONTRACT_STATEMENT_PARAMETERS[name]:  # a programming error, not an input's
        raise ValueError(f"statement {name!r} binds {sorted(CONTRACT_STATEMENT_PARAMETERS[name])}; got {sorted(args)}")
    text = statement(name, dialect="spark")
    return spark.sql(text, args=args) if args else spark.sql(text)


def _register(bids) -> None:
    """``bids`` as :data:`BIDS_VIEW`, with quality 1 when the log has no ``quality`` column (auctions rank by bid)."""
    from pyspark.sql import functions as F

    if "quality" not in bids.columns:
        bids = bids.withColumn("quality", F.lit(1.0).cast("double"))
    bids.createOrReplaceTempView(BIDS_VIEW)


def _validate_spark(context, suite, frame, name: str):
    """Run ``suite`` on the Spark DataFrame ``frame`` (:func:`.contract._validate` with a Spark data source)."""
    _gx_with_spark()
    return _validate(context, suite, frame, name, source_kind="spark")


def run_contract_on_spark(spark, bids, experiment: Experiment, *, config: Mapping[str, Any] | None = None,
                          source: str = "the day's bids") -> list[CheckResult]:
    """Validate one experiment's day, a Spark DataFrame, against the data contract, on Spark.

    Parameters
    ----------
    spark : pyspark.sql.SparkSession
    bids : pyspark.sql.DataFrame
        The day's bids of ``experiment`` (as read from the lake partition); never collected.
    experiment : Experiment
    config : mapping, optional
        Overrides of the ``contract`` thresholds.
    source : str, optional
        Name of the day in log messages and notes.

    Returns
    -------
    list of CheckResult
        As :func:`counterbid.operators.contract.run_contract`: one per name in
        :data:`~counterbid.operators.contract.CONTRACT_CHECKS` (the per-auction checks skipped
        when the schema fails), ``contract_rows`` failing when the day holds no bids. The
        offending auctions listed are the first Spark finds (the local route's are the smallest ids).

    References
    ----------
    Great Expectations 1.x, "Connect to dataframe data" (Spark data source, dataframe asset,
    whole-dataframe batch definition), https://docs.greatexpectations.io
    """
    cfg = check_config(experiment.checks, config, source=f"experiment {experiment.id!r} checks")["contract"]
    severity = cfg["severity"]
    _gx_with_spark()
    context = _context()
    suites = build_suites(experiment, config=config, context=context)
    found = {f.name: duckdb_type_name(f.dataType.simpleString()) for f in bids.schema.fields}
    types = spark.createDataFrame(pd.DataFrame([found]).astype(str))
    results = _fold(_validate_spark(context, suites["schema"], types, "schema"), severity, element="columns")
    if not all(r.passed for r in results):
        return results
    _register(bids)
    params = {"floor": float(experiment.floor or 0.0), "tie_tolerance": float(cfg["tie_tolerance"])}
    auctions = _run_sql(spark, "spark_contract_auction_aggregates", **params).persist()  # every expectation reads it
    try:
        if auctions.isEmpty():
            results.append(CheckResult("contract_rows", severity, False, 0.0, 1.0, {"note": f"{source} holds no bids"}))
            return results
        results += _fold(_validate_spark(context, suites["auctions"], auctions, "auctions"), severity,
                         element="auctions")
    finally:
        auctions.unpersist()
    order = {name: i for i, name in enumerate(CONTRACT_CHECKS)}
    return sorted(results, key=lambda r: order.get(r.check, len(order)))


def spark_auction_counts(spark, bids) -> pd.DataFrame:
    """Auctions per arm and number of bidders of a Spark DataFrame of bids, grouped on the executors.

    Parameters
    ----------
    spark : pyspark.sql.SparkSession
    bids : pyspark.sql.DataFrame
        The day's bids of one experiment.

    Returns
    -------
    pandas.DataFrame
        Columns ``arm``, ``n_bidders``, ``n_auctions`` (int64), sorted: the frame the counting
        checks read (:meth:`counterbid.estimators.checks.AuctionCounts.from_frame`), one row per
        (arm, number of bidders) -- the only rows that reach the driver.
    """
    _register(bids)
    rows = _run_sql(spark, "spark_contract_auction_counts").collect()
    frame = pd.DataFrame([r.asDict() for r in rows], columns=["arm", "n_bidders", "n_auctions"])
    return frame.astype({"arm": object, "n_bidders": "int64", "n_auctions": "int64"})


def lake_day_on_spark(spark, lake_root: str, *, experiment: Experiment, ds):
    """The day's bids of one experiment from the Hive-partitioned lake, as a Spark DataFrame (not collected).

    Spark lists only the ``ds=<day>`` folder under ``lake_root`` and keeps the experiment's rows
    (``sql/spark_lake_partition.spark.sql``), as the Spark estimate step reads the day.

    Parameters
    ----------
    spark : pyspark.sql.SparkSession
    lake_root : str
        Root of the lake (``ds=YYYY-MM-DD`` folders), a path or an object-store URL.
    experiment : Experiment
    ds : datetime.date

    Returns
    -------
    pyspark.sql.DataFrame

    Raises
    ------
    InputError
        The day's folder is missing or unreadable, or the lake has no ``experiment_id`` column.
    """
    from counterbid.readers.spark_shards import lake_day_frame

    frame = lake_day_frame(spark, lake_root, experiment=experiment, ds=ds, source=f"{lake_root} ds={ds}")
    return frame.drop("bid_file", "bid_row")
