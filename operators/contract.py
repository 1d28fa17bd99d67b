"""The bids data contract as a Great Expectations suite, validated on frames fetched from DuckDB.

Two small frames are validated, never the raw bids row by row in Python:

* the relation's schema (``describe``), pivoted to one row of column types;
* one row per auction, aggregated in DuckDB (``sql/check_auction_aggregates.sql``): bids,
  distinct bidders, distinct arms, null keys, invalid bids and rank-vs-position violations.

GE's SQL datasource returns no rows through the DuckDB SQLAlchemy driver, hence pandas frames.
The suite is built in code for each experiment (its arms, floor and thresholds), in an ephemeral
GE context with progress bars and usage statistics switched off.
"""

from __future__ import annotations

import logging
import os
import sys
import types
from collections.abc import Mapping
from typing import Any

import pandas as pd

from counterbid.estimators.bid_contract import BID_CONTRACT
from counterbid.estimators.checks import CheckResult, check_config
from counterbid.estimators.spec import Experiment
from counterbid.sql import render_sql

from . import duckdb_types

__all__ = ["CONTRACT_CHECKS", "COLUMN_TYPES", "build_suites", "run_contract", "with_quality"]

log = logging.getLogger(__name__)

#: Required columns and the DuckDB types (regular expressions) the contract accepts for them: the
#: contract's columns but its partition key (``ds``), translated by ``operators/duckdb_types.py``.
COLUMN_TYPES: Mapping[str, str] = {
    name: pattern for name, pattern in duckdb_types.COLUMN_TYPES.items()
    if not BID_CONTRACT[name].partition_key and not BID_CONTRACT[name].optional
}


def with_quality(con, relation: str) -> str:
    """``relation`` itself when it has a ``quality`` column, else a temp view of it with quality 1.

    The contract aggregates and the statistical checks rank by ``bid x quality``; a log without
    quality factors ranks by bid (``sql/check_unit_quality.sql``).
    """
    described = con.execute(render_sql("check_schema", relation=relation)).df()
    if "quality" in set(described["column_name"]):
        return relation
    view = f"{relation}_unit_quality"
    con.execute(render_sql("check_unit_quality", view=view, relation=relation))
    return view

#: Check names of the contract, in the order they are reported.
CONTRACT_CHECKS = (
    "contract_columns",
    "contract_types",
    "contract_auction_id_not_null",
    "contract_keys_not_null",
    "contract_bids_valid",
    "contract_experiment_id",
    "contract_arm_in_spec",
    "contract_bidder_unique",
    "contract_bidders_per_auction",
    "contract_one_arm",
    "contract_rank_by_bid",
)

_RESULT_FORMAT = {"result_format": "SUMMARY", "unexpected_index_column_names": ["auction_id"], "partial_unexpected_count": 5}


class _NotLoaded(types.ModuleType):
    """Stands in for a library while Great Expectations is imported; any use names what happened."""

    def __getattr__(self, name: str):
        raise AttributeError(f"{self.__name__}.{name}: {self.__name__} was left unloaded when Great Expectations "
                             "was imported by counterbid's contract (its charts are not rendered)")


#: Libraries GE imports at its own import that the contract never uses: ``altair`` only draws the
#: charts of one expectation's rendering (``expect_column_kl_divergence_to_be_less_than``); about
#: 100 modules and 0.1 s CPU of every validate task (measured; tests/benchmarks/bench_dag_steps.py).
UNUSED_BY_CONTRACT = ("altair",)


def _gx():
    # Usage statistics off before GE is imported (it reads the variable at import).
    os.environ.setdefault("GX_ANALYTICS_ENABLED", "False")
    if "great_expectations" not in sys.modules:
        # GE probes for pyspark when it is imported (great_expectations.compatibility.pyspark) and
        # takes it as absent on ImportError. The contract runs on pandas frames; importing pyspark
        # here would only cost time and print PySpark's pandas-3 FutureWarnings on every
        # `counterbid check`. The Spark engine imports pyspark itself, unaffected, when it runs.
        # The stand-ins leave sys.modules after the import: a later `import altair` gets the real one.
        stand_ins = {} if "pyspark" in sys.modules else {"pyspark": None}  # `import pyspark` raises ImportError
        stand_ins |= {name: _NotLoaded(name) for name in UNUSED_BY_CONTRACT if name not in sys.modules}
        sys.modules.update(stand_ins)
        # GE's import logs one INFO line per API function it skips documenting (about 150 lines in every
        # validate task's log, each a record through Airflow's log pipeline): its warnings still show.
        logging.getLogger("great_expectations._docs_decorators").setLevel(logging.WARNING)
        try:
            import great_expectations  # noqa: F401
        finally:
            for name in stand_ins:
                del sys.modules[name]
    import great_expectations as gx

    return gx


def _context():
    gx = _gx()
    from great_expectations.data_context.types.base import ProgressBarsConfig

    context = gx.get_context(mode="ephemeral")
    context.variables.progress_bars = ProgressBarsConfig(globally=False, metric_calculations=False)
    return context


def build_suites(experiment: Experiment, *, config: Mapping[str, Any] | None = None, context=None) -> dict[str, Any]:
    """The contract's two expectation suites for one experiment.

    Parameters
    ----------
    experiment : Experiment
        Arms (allowed ``arm`` values) and floor (smallest admissible bid).
    config : mapping, optional
        Overrides of the ``contract`` thresholds (``max_bidders``, ``min_bidders``,
        ``tie_tolerance``) on top of ``experiment.checks``.
    context : great_expectations data context, optional
        Where the suites are registered; a new ephemeral context when not given.

    Returns
    -------
    dict
        ``{"schema": ExpectationSuite, "auctions": ExpectationSuite}``; every expectation
        carries its check name in ``meta["check"]``.
    """
    gx = _gx()
    from great_expectations import expectations as gxe

    cfg = check_config(experiment.checks, config, source=f"experiment {experiment.id!r} checks")["contract"]
    context = _context() if context is None else context
    schema = context.suites.add(gx.ExpectationSuite(name=f"{experiment.id}.schema"))
    for column in COLUMN_TYPES:
        schema.add_expectation(gxe.ExpectColumnToExist(column=column, meta={"check": "contract_columns"}))
    for column, pattern in COLUMN_TYPES.items():
        schema.add_expectation(
            gxe.ExpectColumnValuesToMatchRegex(column=column, regex=pattern, meta={"check": "contract_types"})
        )

    auctions = context.suites.add(gx.ExpectationSuite(name=f"{experiment.id}.auctions"))
    zero = {"min_value": 0, "max_value": 0}
    for exp in (
        gxe.ExpectColumnValuesToNotBeNull(column="auction_id", meta={"check": "contract_auction_id_not_null"}),
        gxe.ExpectColumnValuesToBeBetween(column="null_keys", **zero, meta={"check": "contract_keys_not_null"}),
        gxe.ExpectColumnValuesToBeBetween(column="bad_bids", **zero, meta={"check": "contract_bids_valid"}),
        gxe.ExpectColumnValuesToBeInSet(column="experiment_id", value_set=[experiment.id],
                                        meta={"check": "contract_experiment_id"}),
        gxe.ExpectColumnValuesToBeInSet(column="arm_min", value_set=list(experiment.arm_names),
                                        meta={"check": "contract_arm_in_spec"}),
        gxe.ExpectColumnValuesToBeInSet(column="arm_max", value_set=list(experiment.arm_names),
                                        meta={"check": "contract_arm_in_spec"}),
        gxe.ExpectColumnPairValuesToBeEqual(column_A="n_bids", column_B="n_bidders",
                                            meta={"check": "contract_bidder_unique"}),
        gxe.ExpectColumnValuesToBeBetween(column="n_bids", min_value=cfg["min_bidders"], max_value=cfg["max_bidders"],
                                          meta={"check": "contract_bidders_per_auction"}),
        gxe.ExpectColumnValuesToBeBetween(column="n_arms", min_value=1, max_value=1, meta={"check": "contract_one_arm"}),
        gxe.ExpectColumnValuesToBeBetween(column="rank_violations", **zero, meta={"check": "contract_rank_by_bid"}),
    ):
        auctions.add_expectation(exp)
    return {"schema": schema, "auctions": auctions}


def _validate(context, suite, frame, name: str, *, source_kind: str = "pandas"):
    """Run ``suite`` on ``frame``, then drop the data source and validation definition it added.

    ``source_kind``: ``'pandas'`` for a pandas frame, ``'spark'`` for a Spark DataFrame (the
    validation then runs on the executors; :mod:`.spark_contract`).

    A data source's execution engine keeps the batches it loaded, i.e. the frame, for as long as
    the source is registered: left in place, every shard's aggregates would stay in memory until the
    context goes (about 100 MiB per 750k-auction shard with text ids), so the day would pile up.
    """
    gx = _gx()
    source = getattr(context.data_sources, f"add_{source_kind}")(f"{name}_source")
    try:
        batch = source.add_dataframe_asset(name).add_batch_definition_whole_dataframe(f"{name}_batch")
        definition = context.validation_definitions.add(
            gx.ValidationDefinition(name=f"{name}_validation", data=batch, suite=suite))
        try:
            return definition.run(batch_parameters={"dataframe": frame}, result_format=_RESULT_FORMAT)
        finally:
            context.validation_definitions.delete(f"{name}_validation")
    finally:
        context.data_sources.delete(f"{name}_source")


def _fold(validation, severity: str, *, element: str) -> list[CheckResult]:
    """One CheckResult per check name: failing elements summed, the first offenders listed."""
    grouped: dict[str, dict[str, Any]] = {}
    for r in validation.results:
        check = r.expectation_config.meta.get("check", r.expectation_config.type)
        g = grouped.setdefault(check, {"passed": True, "unexpected": 0, "elements": 0, "failures": []})
        result = r.result or {}
        g["passed"] = g["passed"] and bool(r.success)
        g["elements"] = max(g["elements"], int(result.get("element_count") or 0))
        g["unexpected"] += int(result.get("unexpected_count") or (0 if r.success else 1))
        if not r.success:
            failure: dict[str, Any] = {"expectation": r.expectation_config.type}
            kwargs = r.expectation_config.kwargs
            if "column" in kwargs:
                failure["column"] = kwargs["column"]
            exc = r.exception_info or {}
            if exc.get("raised_exception"):
                failure["error"] = str(exc.get("exception_message", "")).splitlines()[0][:200]
            examples = result.get("partial_unexpected_index_list") or result.get("partial_unexpected_list") or []
            failure["examples"] = [_plain(x) for x in examples[:5]]
            g["failures"].append(failure)
    return [
        CheckResult(name, severity, g["passed"], float(g["unexpected"]), 0.0,
                    {"unit": element, "checked": g["elements"], "failures": g["failures"]})
        for name, g in grouped.items()
    ]


def _plain(x: Any) -> Any:
    if isinstance(x, dict):
        return {str(k): _plain(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_plain(v) for v in x]
    if hasattr(x, "item"):
        return x.item()
    return x


#: Failures (one per failing expectation and shard) a contract check lists in its details.
MAX_LISTED_FAILURES = 10


def run_contract(con, relation: str, experiment: Experiment, *, config: Mapping[str, Any] | None = None,
                 shards: Mapping[str, str] | None = None) -> list[CheckResult]:
    """Validate the day's bids in a DuckDB relation against the data contract.

    Parameters
    ----------
    con : duckdb.DuckDBPyConnection
        Connection holding the bids as a table or view.
    relation : str
        Its name (a plain identifier, validated and quoted).
    experiment : Experiment
    config : mapping, optional
        Overrides of the ``contract`` thresholds.
    shards : mapping of str to str, optional
        The day as relations of whole auctions (view name -> the files it reads, named in the
        failures): the per-auction aggregates and their suite run on one shard at a time and the
        outcomes are added up, so neither DuckDB nor the frame GX validates ever holds the day.
        The outcome equals the whole day's (an auction never spans two shards), apart from
        which offending auctions are listed. Default: ``relation`` as one piece.

    Returns
    -------
    list of CheckResult
        One per name in :data:`CONTRACT_CHECKS` (the per-auction checks are skipped when the
        schema check fails). ``observed`` is the number of failing auctions (or columns),
        ``threshold`` 0; ``details`` lists up to five offending auction ids per expectation
        (with several shards, per expectation and shard, each with the ``shard`` files it lies in).
    """
    cfg = check_config(experiment.checks, config, source=f"experiment {experiment.id!r} checks")["contract"]
    severity = cfg["severity"]
    context = _context()
    suites = build_suites(experiment, config=config, context=context)
    described = con.execute(render_sql("check_schema", relation=relation)).df()
    types = pd.DataFrame([dict(zip(described["column_name"], described["column_type"].astype(str)))])
    results = _fold(_validate(context, suites["schema"], types, "schema"), severity, element="columns")
    if not all(r.passed for r in results):
        log.warning("contract: schema of %s fails; per-auction checks skipped", relation)
        return results
    params = {"floor": float(experiment.floor or 0.0), "tie_tolerance": float(cfg["tie_tolerance"])}
    pieces = dict(shards) if shards else {relation: None}
    parts = []
    for i, (piece, files) in enumerate(pieces.items()):
        auctions = con.execute(render_sql("check_auction_aggregates", relation=with_quality(con, piece)), params).df()
        if not auctions.empty:
            parts.append((files, _fold(_validate(context, suites["auctions"], auctions, f"auctions_{i}"), severity,
                                       element="auctions")))
        del auctions  # one shard's aggregates at a time
    if not parts:
        results.append(CheckResult("contract_rows", severity, False, 0.0, 1.0, {"note": f"{relation} holds no bids"}))
        return results
    results += parts[0][1] if len(pieces) == 1 else _added(parts)
    order = {name: i for i, name in enumerate(CONTRACT_CHECKS)}
    return sorted(results, key=lambda r: order.get(r.check, len(order)))


def _added(parts: list[tuple[str | None, list[CheckResult]]]) -> list[CheckResult]:
    """Each check's outcomes on several shards as one: passed on all, failing and checked auctions
    added, the failures listed with the ``shard`` files they were found in."""
    grouped: dict[str, list[tuple[str | None, CheckResult]]] = {}
    for files, results in parts:
        for r in results:
            grouped.setdefault(r.check, []).append((files, r))
    out = []
    for check, found in grouped.items():
        first = found[0][1]
        failures = [dict(f, shard=files) for files, r in found for f in r.details["failures"]]
        out.append(CheckResult(check, first.severity, all(r.passed for _, r in found),
                               float(sum(r.observed for _, r in found)), first.threshold,
                               {"unit": first.details["unit"], "checked": sum(r.details["checked"] for _, r in found),
                                "failures": failures[:MAX_LISTED_FAILURES]}))
    return out
