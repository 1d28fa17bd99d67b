"""The schema gate: the minimal bids data contract of a staged day, checked before anything else.

Columns and their DuckDB types, at least one row, no nulls in the required columns, only the
spec's arms. Every result has severity ``error``; the full data checks
(:mod:`counterbid.operators.check_runner`) run only when the gate passes.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol

import pandas as pd

from counterbid.estimators import CheckResult, Experiment
from counterbid.estimators.bid_contract import BID_CONTRACT

from . import duckdb_types
from .lake_hook import LakeHook
from .staging import StagedPartition

__all__ = ["CONTRACT_TYPES", "GateInputs", "StagedGateInputs", "gate_checks", "schema_gate"]

#: Accepted DuckDB types (regular expressions) of the bids data contract (docs/usage.md, "Bids data contract"),
#: translated from ``counterbid.estimators.bid_contract`` by ``operators/duckdb_types.py``.
CONTRACT_TYPES: dict[str, str] = duckdb_types.COLUMN_TYPES


def _arm_counts(lake: LakeHook, staged: StagedPartition) -> pd.DataFrame:
    """Auctions and bids per arm of the staged day, counted shard by shard and added up.

    An auction lies in one shard (the load step splits by the hash of its id), so distinct auctions
    add across shards, and DuckDB never holds more than one shard's distinct auction ids.
    """
    shards = staged.shards()
    if len(shards) <= 1:
        return lake.staged_arm_counts(staged.day)
    parts = [lake.staged_arm_counts(staged.shard(k)) for k in shards]
    total = pd.concat(parts, ignore_index=True).groupby("arm", dropna=False, as_index=False)[["n_auctions", "n_bids"]].sum()
    return total.sort_values("arm", na_position="first", ignore_index=True)


class GateInputs(Protocol):
    """What the schema gate reads of a day: the same rules whichever engine answers.

    :class:`StagedGateInputs` answers from the staged shard files (DuckDB); the Spark validate step
    answers from the lake day on Spark (:mod:`counterbid.operators.spark_checks`).
    """

    def columns(self) -> dict[str, str]:
        """Column name -> DuckDB type name (read from the Parquet metadata)."""
        ...

    def integer_range(self, column: str) -> tuple[int, str | None]:
        """Rows whose integer ``column`` lies outside int64, and the smallest such value."""
        ...

    def arm_counts(self) -> pd.DataFrame:
        """Auctions and bids per arm (columns ``arm``, ``n_auctions``, ``n_bids``; nulls first)."""
        ...

    def null_counts(self) -> dict[str, int]:
        """Nulls per always-required contract column."""
        ...

    def quality_faults(self) -> tuple[int, str | None, int | None, str | None, str | None]:
        """Rows whose quality is missing or not > 0, and the first one (file, row, auction, value)."""
        ...


@dataclass(frozen=True)
class StagedGateInputs:
    """The gate's inputs from the day the load step staged (its shard files, read by in-memory DuckDB)."""

    lake: LakeHook
    staged: StagedPartition

    def columns(self) -> dict[str, str]:
        return self.lake.staged_columns(self.staged.require(self.staged.day, step="load"))

    def integer_range(self, column: str) -> tuple[int, str | None]:
        return self.lake.staged_integer_range(self.staged.day, column)

    def arm_counts(self) -> pd.DataFrame:
        return _arm_counts(self.lake, self.staged)

    def null_counts(self) -> dict[str, int]:
        return self.lake.staged_null_counts(self.staged.day)

    def quality_faults(self) -> tuple[int, str | None, int | None, str | None, str | None]:
        return self.lake.staged_quality_faults(self.staged.day_files)


def schema_gate(lake: LakeHook, *, experiment: Experiment, staged: StagedPartition) -> list[CheckResult]:
    """Minimal contract gate of a staged day: columns and types, rows present, no nulls, known arms,
    and, when the log has a ``quality`` column, a factor > 0 on every row (``schema_quality_positive``).

    Every result has severity ``error``: a failure stops this (experiment, day). The staged
    files are read by ``lake`` (in-memory DuckDB), whatever the results sink.
    """
    staged.require(staged.day, step="load")
    return gate_checks(StagedGateInputs(lake, staged), experiment=experiment)


def gate_checks(inputs: GateInputs, *, experiment: Experiment) -> list[CheckResult]:
    """The schema gate's rules on a day's :class:`GateInputs` (one definition for both engines).

    Parameters
    ----------
    inputs : GateInputs
    experiment : Experiment

    Returns
    -------
    list of CheckResult
        Every result has severity ``error``; the counts are asked for only once the columns pass.
    """
    columns = inputs.columns()
    results = []
    for name, allowed in CONTRACT_TYPES.items():
        found = columns.get(name)
        if found is None and BID_CONTRACT[name].optional:
            continue  # ``quality`` may be absent; where present, its type and values are checked
        ok = duckdb_types.accepts(name, found)
        results.append(CheckResult(
            check=f"schema_column_{name}", severity="error", passed=ok, observed=1.0 if ok else 0.0, threshold=1.0,
            details={"kind": BID_CONTRACT[name].kind, "expected": allowed, "found": found or "missing"}))
    if not all(r.passed for r in results):
        return results  # counts below need the columns
    for name, found in columns.items():  # 128-bit (and UBIGINT) integers: accepted when every value fits int64
        if name in CONTRACT_TYPES and duckdb_types.needs_range_check(name, found):
            outside, example = inputs.integer_range(name)
            results.append(CheckResult(
                check=f"schema_range_{name}", severity="error", passed=outside == 0, observed=float(outside),
                threshold=0.0, details={"type": found, "allowed": "int64", "example": example}))
    if not all(r.passed for r in results):
        return results
    counts = inputs.arm_counts()
    total = int(counts["n_bids"].sum())
    results.append(CheckResult(check="schema_rows", severity="error", passed=total >= 1, observed=float(total),
                               threshold=1.0, details={"experiment_id": experiment.id}))
    for name, nulls in inputs.null_counts().items():
        if BID_CONTRACT[name].nullable:
            continue
        results.append(CheckResult(check=f"schema_nulls_{name}", severity="error", passed=nulls == 0,
                                   observed=float(nulls), threshold=0.0, details={"rows": total}))
    if "quality" in columns:  # auctions rank by bid x quality: every row needs a factor > 0
        n_faults, first_file, first_row, first_auction, first_quality = inputs.quality_faults()
        results.append(CheckResult(
            check="schema_quality_positive", severity="error", passed=n_faults == 0, observed=float(n_faults),
            threshold=0.0, details={"rows": total} | ({} if n_faults == 0 else {
                "file": first_file, "first_row": first_row, "auction_id": first_auction, "quality": first_quality,
                "error": f"{first_file}: column 'quality' row {first_row} (auction {first_auction}) is {first_quality}; "
                         "quality factors must be > 0 wherever the column exists"})))
    unknown = counts[~counts["arm"].isin(experiment.arm_names)]
    n_unknown = int(unknown["n_bids"].sum())
    results.append(CheckResult(
        check="schema_known_arms", severity="error", passed=n_unknown == 0, observed=float(n_unknown), threshold=0.0,
        details={"unknown_arms": [None if pd.isna(a) else str(a) for a in unknown["arm"]][:10],
                 "spec_arms": list(experiment.arm_names)}))
    return results
