"""The schema gate: the minimal bids data contract of a staged day, checked before anything else.

Columns and their DuckDB types, at least one row, no nulls in the required columns, only the
spec's arms. Every result has severity ``error``; the full data checks
(:mod:`counterbid.operators.check_runner`) run only when the gate passes.
"""

from __future__ import annotations

import pandas as pd

from counterbid.estimators import CheckResult, Experiment
from counterbid.estimators.bid_contract import BID_CONTRACT

from . import duckdb_types
from .lake_hook import LakeHook
from .staging import StagedPartition

__all__ = ["CONTRACT_TYPES", "schema_gate"]

#: Accepted DuckDB types (regular expressions) of the bids data contract (docs/usage.md, "Bids data contract"),
#: translated from ``counterbid.estimators.bid_contract`` by ``operators/duckdb_types.py``.
CONTRACT_TYPES: dict[str, str] = duckdb_types.COLUMN_TYPES


def schema_gate(lake: LakeHook, *, experiment: Experiment, staged: StagedPartition) -> list[CheckResult]:
    """Minimal contract gate of a staged day: columns and types, rows present, no nulls, known arms,
    and, when the log has a ``quality`` column, a factor > 0 on every row (``schema_quality_positive``).

    Every result has severity ``error``: a failure stops this (experiment, day). The staged
    files are read by ``lake`` (in-memory DuckDB), whatever the results sink.
    """
    path = staged.require(staged.day, step="load")
    columns = lake.staged_columns(path)
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
            outside, example = lake.staged_integer_range(path, name)
            results.append(CheckResult(
                check=f"schema_range_{name}", severity="error", passed=outside == 0, observed=float(outside),
                threshold=0.0, details={"type": found, "allowed": "int64", "example": example}))
    if not all(r.passed for r in results):
        return results
    counts = lake.staged_arm_counts(path)
    total = int(counts["n_bids"].sum())
    results.append(CheckResult(check="schema_rows", severity="error", passed=total >= 1, observed=float(total),
                               threshold=1.0, details={"experiment_id": experiment.id}))
    for name, nulls in lake.staged_null_counts(path).items():
        if BID_CONTRACT[name].nullable:
            continue
        results.append(CheckResult(check=f"schema_nulls_{name}", severity="error", passed=nulls == 0,
                                   observed=float(nulls), threshold=0.0, details={"rows": total}))
    if "quality" in columns:  # auctions rank by bid x quality: every row needs a factor > 0
        n_faults, first_row, first_auction, first_quality = lake.staged_quality_faults(path)
        results.append(CheckResult(
            check="schema_quality_positive", severity="error", passed=n_faults == 0, observed=float(n_faults),
            threshold=0.0, details={"rows": total} | ({} if n_faults == 0 else {
                "first_row": first_row, "auction_id": first_auction, "quality": first_quality,
                "error": f"{path}: column 'quality' row {first_row} (auction {first_auction}) is {first_quality}; "
                         "quality factors must be > 0 wherever the column exists"})))
    unknown = counts[~counts["arm"].isin(experiment.arm_names)]
    n_unknown = int(unknown["n_bids"].sum())
    results.append(CheckResult(
        check="schema_known_arms", severity="error", passed=n_unknown == 0, observed=float(n_unknown), threshold=0.0,
        details={"unknown_arms": [None if pd.isna(a) else str(a) for a in unknown["arm"]][:10],
                 "spec_arms": list(experiment.arm_names)}))
    return results
