"""One (experiment, day) through the pipeline: stage, check, estimate, write.

Each function does one step for one partition and is what one operator calls. Bid frames never
travel through XCom: every step reads and writes files of a per-(experiment, day) staging folder
(written atomically), and the last step replaces the partition's rows in the results database in
one transaction and removes the folder.
"""

from __future__ import annotations

import datetime as dt
import json
import logging
import os
import re
import shutil
from collections.abc import Mapping
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
from scipy.optimize import isotonic_regression

from counterbid.cli.io import read_bids
from counterbid.estimators import (
    CheckResult, Experiment, estimate_arms, load_experiments, prepare_bids, worst_failure,
)
from counterbid.estimators.arms import METHOD_VERSION
from counterbid.estimators.errors import InputError

from .checks import run_checks, write_check_results
from .hooks import ResultsHook

__all__ = [
    "EARLIEST_DAY",
    "StagedPartition",
    "active_experiment_ids",
    "estimate_partition",
    "load_checks",
    "measured_position_weights",
    "parse_day",
    "record_checks",
    "run_partition_checks",
    "schema_gate",
    "store_checks",
    "stage_partition",
    "write_partition",
]

log = logging.getLogger(__name__)

#: Experiments without a ``start`` pool every day of the lake up to the run's day.
EARLIEST_DAY = dt.date(1970, 1, 1)
_PATH_SAFE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.\-]{0,127}$")
#: Accepted DuckDB types of the bids data contract (README, "Bids data contract").
_INTEGER = {"TINYINT", "SMALLINT", "INTEGER", "BIGINT", "UTINYINT", "USMALLINT", "UINTEGER", "UBIGINT"}
CONTRACT_TYPES: dict[str, set[str]] = {
    "experiment_id": {"VARCHAR"},
    "ds": {"DATE"},
    "auction_id": {"VARCHAR"} | _INTEGER,
    "bidder_id": {"VARCHAR"} | _INTEGER,
    "arm": {"VARCHAR"},
    "bid": {"DOUBLE", "FLOAT"},
    "position": _INTEGER,
}


def parse_day(value: object, *, what: str = "ds") -> dt.date:
    """A day from a ``date``, a ``datetime`` or an ISO string (Airflow's ``{{ ds }}``)."""
    if isinstance(value, dt.datetime):
        return value.date()
    if isinstance(value, dt.date):
        return value
    try:
        return dt.date.fromisoformat(str(value)[:10])
    except ValueError:
        raise InputError(f"{what}: must be a date YYYY-MM-DD; got {value!r}") from None


@dataclass(frozen=True)
class StagedPartition:
    """Files of one (experiment, day) in the staging folder.

    Attributes
    ----------
    folder : Path
        ``<staging_root>/<experiment_id>/ds=YYYY-MM-DD``.
    """

    folder: Path

    @classmethod
    def at(cls, staging_root: str | Path, experiment_id: str, ds: dt.date) -> "StagedPartition":
        if not _PATH_SAFE.match(experiment_id):
            raise InputError(f"experiment id {experiment_id!r} cannot name a staging folder (letters, digits, '_', '.', '-')")
        return cls(Path(staging_root) / experiment_id / f"ds={ds.isoformat()}")

    day = property(lambda self: self.folder / "day.parquet")
    to_date = property(lambda self: self.folder / "to_date.parquet")
    checks = property(lambda self: self.folder / "checks.json")
    estimates_day = property(lambda self: self.folder / "estimates_day.parquet")
    estimates_to_date = property(lambda self: self.folder / "estimates_to_date.parquet")
    weights = property(lambda self: self.folder / "position_weights.parquet")

    def require(self, path: Path, *, step: str) -> Path:
        if not path.exists():
            raise InputError(f"{path}: missing; run the {step!r} step of this (experiment, day) first")
        return path


def _write_parquet(table: pa.Table, target: Path) -> None:
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = target.with_name(f".{target.name}.{os.getpid()}.tmp")
    pq.write_table(table, tmp)
    os.replace(tmp, target)  # readers see the old file or the new one, never half of one


def _stream_parquet(batches: pa.RecordBatchReader, target: Path) -> tuple[int, dt.date | None]:
    """Write a stream of batches to ``target`` atomically; rows written and the earliest ``ds``."""
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = target.with_name(f".{target.name}.{os.getpid()}.tmp")
    rows, earliest = 0, None
    has_ds = "ds" in batches.schema.names
    try:
        with pq.ParquetWriter(tmp, batches.schema) as writer:
            for batch in batches:
                writer.write_batch(batch)
                rows += batch.num_rows
                if has_ds and batch.num_rows:
                    low = pc.min(batch.column("ds")).as_py()
                    earliest = low if earliest is None or (low is not None and low < earliest) else earliest
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    os.replace(tmp, target)  # readers see the old file or the new one, never half of one
    return rows, earliest


def _write_json(payload, target: Path) -> None:
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = target.with_name(f".{target.name}.{os.getpid()}.tmp")
    tmp.write_text(json.dumps(payload, indent=1, default=str), encoding="utf-8")
    os.replace(tmp, target)


def active_experiment_ids(spec_path: str | Path, ds: object) -> list[str]:
    """Ids of the experiments of ``spec_path`` that run on day ``ds``, in file order."""
    day = parse_day(ds)
    return [e.id for e in load_experiments(spec_path).values() if e.is_active(day)]


class MissingPartitionError(RuntimeError):
    """The day's partition folder does not exist (yet): retryable, unlike bad input."""


def stage_partition(
    hook: ResultsHook, *, lake_root: str | Path, experiment: Experiment, ds: dt.date, staging_root: str | Path
) -> dict:
    """Copy the day's bids and the experiment-to-date bids of one experiment into staging.

    Returns
    -------
    dict
        ``{"day_bids": int, "to_date_bids": int, "first_ds": str, "folder": str}``.
    """
    staged = StagedPartition.at(staging_root, experiment.id, ds)
    # Both spans are streamed batch by batch into their staged files (memory: about one batch).
    with hook.lake_partition_batches(lake_root, experiment_id=experiment.id, ds=ds) as batches:
        day_rows, _ = _stream_parquet(batches, staged.day)
    if day_rows == 0 and "://" not in str(lake_root) and not (Path(lake_root) / f"ds={ds}").exists():
        # Late data looks like this: raised as a retryable failure that names the folder.
        staged.day.unlink(missing_ok=True)
        raise MissingPartitionError(f"{lake_root}: partition ds={ds} is missing (no such folder)")
    first = experiment.start or EARLIEST_DAY
    with hook.lake_range_batches(lake_root, experiment_id=experiment.id, first_ds=first, ds=ds) as batches:
        to_date_rows, earliest = _stream_parquet(batches, staged.to_date)
    first_ds = earliest if earliest is not None else first
    return {"day_bids": day_rows, "to_date_bids": to_date_rows, "first_ds": str(first_ds), "folder": str(staged.folder)}


def schema_gate(hook: ResultsHook, *, experiment: Experiment, staged: StagedPartition) -> list[CheckResult]:
    """Minimal contract gate of a staged day: columns and types, rows present, no nulls, known arms.

    Every result has severity ``error``: a failure stops this (experiment, day).
    """
    path = staged.require(staged.day, step="load")
    columns = hook.staged_columns(path)
    results = []
    for name, allowed in CONTRACT_TYPES.items():
        found = columns.get(name)
        ok = found is not None and found in allowed
        results.append(CheckResult(
            check=f"schema_column_{name}", severity="error", passed=ok, observed=1.0 if ok else 0.0, threshold=1.0,
            details={"expected": sorted(allowed), "found": found or "missing"}))
    if not all(r.passed for r in results):
        return results  # counts below need the columns
    counts = hook.staged_arm_counts(path)
    total = int(counts["n_bids"].sum())
    results.append(CheckResult(check="schema_rows", severity="error", passed=total >= 1, observed=float(total),
                               threshold=1.0, details={"experiment_id": experiment.id}))
    for name, nulls in hook.staged_null_counts(path).items():
        results.append(CheckResult(check=f"schema_nulls_{name}", severity="error", passed=nulls == 0,
                                   observed=float(nulls), threshold=0.0, details={"rows": total}))
    unknown = counts[~counts["arm"].isin(experiment.arm_names)]
    n_unknown = int(unknown["n_bids"].sum())
    results.append(CheckResult(
        check="schema_known_arms", severity="error", passed=n_unknown == 0, observed=float(n_unknown), threshold=0.0,
        details={"unknown_arms": [None if pd.isna(a) else str(a) for a in unknown["arm"]][:10],
                 "spec_arms": list(experiment.arm_names)}))
    return results


#: The full data-check runner, ``f(con, relation, experiment, *, ds, history_relation)`` returning
#: a list of CheckResult, and the function that stores outcomes in the ``data_checks`` table,
#: ``f(con, results, *, experiment_id, ds, run_id, schema)``. Set either to ``None`` to run only
#: the schema gate / keep outcomes in the staging folder only.
CHECK_RUNNER = run_checks
CHECK_RECORDER = write_check_results


def run_partition_checks(hook: ResultsHook, *, experiment: Experiment, staged: StagedPartition, ds: dt.date) -> list[CheckResult]:
    """Every check run on one staged (experiment, day) before it is estimated.

    The schema gate first; when it passes and :data:`CHECK_RUNNER` is set, the runner's checks
    follow, on temp tables ``staged_day`` and ``staged_history`` (earlier days of the experiment).
    """
    results = schema_gate(hook, experiment=experiment, staged=staged)
    if CHECK_RUNNER is None or worst_failure(results) == "error":
        return results
    with hook.staged_relations(day=staged.day, to_date=staged.require(staged.to_date, step="load"), ds=ds) as con:
        return results + list(CHECK_RUNNER(con, "staged_day", experiment, ds=ds, history_relation="staged_history"))


def store_checks(hook: ResultsHook, results: list[CheckResult], *, experiment_id: str, ds: dt.date, run_id: str) -> None:
    """Store outcomes with :data:`CHECK_RECORDER` when set; a failure here is logged, never raised."""
    if CHECK_RECORDER is None:
        return
    try:
        hook.record_checks(CHECK_RECORDER, results, experiment_id=experiment_id, ds=ds, run_id=run_id)
    except Exception:  # recording outcomes must never be what fails the task
        log.exception("could not store the check outcomes of %s on %s", experiment_id, ds)


def record_checks(staged: StagedPartition, results: list[CheckResult]) -> str:
    """Write the check outcomes beside the staged bids; return the partition status.

    Returns
    -------
    str
        ``'error'`` when an error check failed, ``'warning'`` when only warnings failed, else ``'ok'``.
    """
    worst = worst_failure(results)
    status = worst or "ok"
    _write_json({"status": status, "checks": [asdict(r) | {"details": dict(r.details)} for r in results]}, staged.checks)
    return status


def load_checks(staged: StagedPartition) -> str:
    """Status recorded by the validate step (``'ok'`` or ``'warning'``); refuses ``'error'``."""
    payload = json.loads(staged.require(staged.checks, step="validate").read_text(encoding="utf-8"))
    status = payload.get("status")
    if status not in ("ok", "warning"):
        raise InputError(f"{staged.checks}: checks ended with status {status!r}; this partition is not estimated")
    return status


def measured_position_weights(clicks: pd.DataFrame, experiment: Experiment) -> dict[str, dict]:
    """Position weights of the ``measured`` arms from pooled clicks and impressions.

    The raw ratios clicks/impressions are made non-increasing in position by weighted isotonic
    regression (impressions as weights, ``scipy.optimize.isotonic_regression``), since the
    estimator needs ``w_1 >= w_2 >= ...``; positions after the first never shown are dropped.

    Returns
    -------
    dict of arm name to {"weights": list, "impressions": list, "clicks": list}
    """
    out = {}
    for arm in experiment.arms:
        if not arm.measured:
            continue
        rows = clicks[clicks["arm"] == arm.name].sort_values("position")
        rows = rows[rows["impressions"] > 0]
        expected = np.arange(1, len(rows) + 1)
        if len(rows) and not np.array_equal(rows["position"].to_numpy(), expected):
            gap = int(np.flatnonzero(rows["position"].to_numpy() != expected)[0]) + 1
            rows = rows[rows["position"] < gap]
        if rows.empty or rows["clicks"].sum() <= 0:
            raise InputError(f"click log: no clicks for experiment {experiment.id!r} arm {arm.name!r} in the window")
        raw = (rows["clicks"] / rows["impressions"]).to_numpy(float)
        fitted = isotonic_regression(raw, weights=rows["impressions"].to_numpy(float), increasing=False).x
        out[arm.name] = {"weights": [float(w) for w in fitted], "impressions": rows["impressions"].astype(int).tolist(),
                         "clicks": rows["clicks"].astype(int).tolist()}
    return out


def estimate_partition(
    hook: ResultsHook,
    *,
    experiment: Experiment,
    ds: dt.date,
    staging_root: str | Path,
    run_id: str,
    clicks_root: str | Path | None = None,
    click_window_days: int = 7,
    confidence_level: float = 0.95,
    cluster: str = "auto",
) -> dict:
    """Estimate every arm from the staged day and the staged experiment-to-date bids.

    Calls :func:`counterbid.estimators.estimate_arms` once per span and writes its rows, with the
    partition keys, status and provenance, to the staging folder.

    Returns
    -------
    dict
        Sample sizes and the revenue estimate per arm (small; logged and returned to XCom).
    """
    staged = StagedPartition.at(staging_root, experiment.id, ds)
    status = load_checks(staged)
    computed_at = pd.Timestamp.now(tz="UTC")
    weights_rows = []
    measured: dict[str, dict] = {}
    first_click = None
    if any(a.measured for a in experiment.arms):
        if clicks_root in (None, ""):
            raise InputError(f"experiment {experiment.id!r}: position_weights 'measured' needs a click log (clicks_root)")
        first_click = ds - dt.timedelta(days=int(click_window_days) - 1)
        clicks = hook.clicks_position_weights(clicks_root, experiment_id=experiment.id, first_ds=first_click, ds=ds)
        measured = measured_position_weights(clicks, experiment)
        experiment = experiment.with_position_weights({k: v["weights"] for k, v in measured.items()})
    for arm in experiment.arms:
        m = measured.get(arm.name)
        for k, w in enumerate(arm.position_weights, start=1):
            weights_rows.append(dict(
                experiment_id=experiment.id, ds=ds, arm=arm.name, position=k, weight=float(w),
                source="measured" if m else "spec", impressions=m["impressions"][k - 1] if m else None,
                clicks=m["clicks"][k - 1] if m else None, first_click_ds=first_click if m else None,
                run_id=run_id, computed_at=computed_at))
    summary = {"experiment_id": experiment.id, "ds": ds.isoformat(), "status": status}
    for span, path, target in (("day", staged.day, staged.estimates_day), ("to_date", staged.to_date, staged.estimates_to_date)):
        bids = read_bids(staged.require(path, step="load"))  # batch by batch; strings as categoricals
        first_ds = pd.to_datetime(bids["ds"]).min().date() if span == "to_date" else None
        prepared = prepare_bids(bids, experiment, source=f"{path}")
        del bids  # only the validated arrays from here on: the to-date pool bounds a worker's memory
        table = estimate_arms(prepared, experiment, confidence_level=confidence_level, cluster=cluster, source=f"{path}")
        del prepared
        table.insert(0, "experiment_id", experiment.id)
        table.insert(1, "ds", ds)
        if span == "to_date":
            table.insert(2, "first_ds", first_ds)
        table["status"] = status
        table["method_version"] = table.attrs.get("method_version", METHOD_VERSION)
        table["run_id"] = run_id
        table["computed_at"] = computed_at
        _write_parquet(pa.Table.from_pandas(table, preserve_index=False), target)
        summary[f"{span}_bids"] = int(table.attrs["n_bids"])
        rev = table[table["metric"] == "revenue_per_auction"].set_index("arm")["estimate"]
        summary[f"{span}_revenue_per_auction"] = {k: round(float(v), 6) for k, v in rev.items()}
    _write_parquet(pa.Table.from_pylist(weights_rows), staged.weights)
    return summary


def write_partition(
    hook: ResultsHook, *, experiment_id: str, ds: dt.date, staging_root: str | Path, cleanup: bool = True
) -> dict[str, int]:
    """Replace the (experiment, day)'s rows of every results table in one transaction.

    Returns
    -------
    dict of str to int
        Rows written per table.
    """
    staged = StagedPartition.at(staging_root, experiment_id, ds)
    tables: Mapping[str, pa.Table] = {
        "arm_estimates": pq.read_table(staged.require(staged.estimates_day, step="estimate")),
        "arm_estimates_to_date": pq.read_table(staged.require(staged.estimates_to_date, step="estimate")),
        "position_weights": pq.read_table(staged.require(staged.weights, step="estimate")),
    }
    counts = hook.replace_partition(experiment_id=experiment_id, ds=ds, tables=tables)
    if cleanup:
        shutil.rmtree(staged.folder, ignore_errors=True)
    return counts
