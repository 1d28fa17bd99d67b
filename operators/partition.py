"""One (experiment, day) through the pipeline: stage, check, estimate, write.

Each function does one step for one partition and is what one operator calls. Bid frames never
travel through XCom: every step reads and writes files of a per-(experiment, day) staging folder
(:mod:`counterbid.operators.staging`), and the last step replaces the partition's rows in the
results database in one transaction and removes the folder.
"""

from __future__ import annotations

import datetime as dt
import json
import logging
import shutil
from collections.abc import Mapping
from dataclasses import asdict
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from counterbid.readers.bid_log import read_bids
from counterbid.estimators import (
    CheckResult, Experiment, estimate_arms, load_experiments, measured_position_weights, parse_day, prepare_bids,
    worst_failure,
)
from counterbid.estimators.arms import METHOD_VERSION
from counterbid.estimators.errors import InputError

from .check_runner import run_checks, write_check_results
from .hooks import ResultsHook
from .schema_gate import schema_gate
from .staging import StagedPartition, stream_parquet, write_json, write_parquet
from .stored_rows import with_stored_columns

__all__ = [
    "EARLIEST_DAY",
    "MissingPartitionError",
    "active_experiment_ids",
    "estimate_partition",
    "load_checks",
    "record_checks",
    "run_partition_checks",
    "stage_measured_weights",
    "stage_partition",
    "staged_experiment",
    "store_checks",
    "write_partition",
]

log = logging.getLogger(__name__)

#: Experiments without a ``start`` pool every day of the lake up to the run's day.
EARLIEST_DAY = dt.date(1970, 1, 1)


def active_experiment_ids(spec_path: str | Path, ds: object) -> list[str]:
    """Ids of the experiments of ``spec_path`` that run on day ``ds``, in file order."""
    day = parse_day(ds)
    return [e.id for e in load_experiments(spec_path).values() if e.is_active(day)]


class MissingPartitionError(RuntimeError):
    """The day's partition folder does not exist (yet): retryable, unlike bad input."""


def stage_partition(
    hook: ResultsHook,
    *,
    lake_root: str | Path,
    experiment: Experiment,
    ds: dt.date,
    staging_root: str | Path,
    clicks_root: str | Path | None = None,
    click_window_days: int = 7,
) -> dict:
    """Copy the day's bids and the experiment-to-date bids of one experiment into staging.

    When an arm's position weights are ``measured``, they are computed here from the click log,
    once per (experiment, day), and staged for the checks and the estimate
    (:func:`stage_measured_weights`).

    Returns
    -------
    dict
        ``{"day_bids": int, "to_date_bids": int, "first_ds": str, "folder": str,
        "measured_arms": list}``.
    """
    staged = StagedPartition.at(staging_root, experiment.id, ds)
    # Both spans are streamed batch by batch into their staged files (memory: about one batch).
    with hook.lake_partition_batches(lake_root, experiment_id=experiment.id, ds=ds) as batches:
        day_rows, _ = stream_parquet(batches, staged.day)
    if day_rows == 0 and "://" not in str(lake_root) and not (Path(lake_root) / f"ds={ds}").exists():
        # Late data looks like this: raised as a retryable failure that names the folder.
        staged.day.unlink(missing_ok=True)
        raise MissingPartitionError(f"{lake_root}: partition ds={ds} is missing (no such folder)")
    first = experiment.start or EARLIEST_DAY
    with hook.lake_range_batches(lake_root, experiment_id=experiment.id, first_ds=first, ds=ds) as batches:
        to_date_rows, earliest = stream_parquet(batches, staged.to_date)
    first_ds = earliest if earliest is not None else first
    measured = stage_measured_weights(hook, experiment=experiment, ds=ds, staged=staged, clicks_root=clicks_root,
                                      click_window_days=click_window_days)
    return {"day_bids": day_rows, "to_date_bids": to_date_rows, "first_ds": str(first_ds), "folder": str(staged.folder),
            "measured_arms": [] if measured is None else list(dict.fromkeys(measured["arm"]))}


def stage_measured_weights(
    hook: ResultsHook,
    *,
    experiment: Experiment,
    ds: dt.date,
    staged: StagedPartition,
    clicks_root: str | Path | None,
    click_window_days: int = 7,
) -> pd.DataFrame | None:
    """Measure the ``measured`` arms' position weights from the click log and stage them.

    Clicks and impressions are pooled over the ``click_window_days`` days ending on ``ds``
    (``sql/clicks_position_weights.sql``) and fitted by
    :func:`counterbid.estimators.measured_position_weights`. The staged file (one row per arm
    and position, with ``first_click_ds``) is what the checks and the estimate use; an experiment
    without measured arms stages nothing.

    Returns
    -------
    pandas.DataFrame or None
        The staged rows; ``None`` when no arm is measured.
    """
    if not any(a.measured for a in experiment.arms):
        staged.measured_weights.unlink(missing_ok=True)  # left by an earlier spec: not this one's
        return None
    if clicks_root in (None, ""):
        raise InputError(f"experiment {experiment.id!r}: position_weights 'measured' needs a click log (clicks_root)")
    if isinstance(click_window_days, bool) or not isinstance(click_window_days, int) or click_window_days < 1:
        raise InputError(f"`click_window_days` must be an integer >= 1; got {click_window_days!r}")
    first_click = ds - dt.timedelta(days=click_window_days - 1)
    clicks = hook.clicks_position_weights(clicks_root, experiment_id=experiment.id, first_ds=first_click, ds=ds)
    fitted = measured_position_weights(clicks, experiment, source=f"{clicks_root} ({first_click}..{ds})")
    fitted["first_click_ds"] = first_click
    write_parquet(pa.Table.from_pandas(fitted, preserve_index=False), staged.measured_weights)
    return fitted


def staged_experiment(experiment: Experiment, staged: StagedPartition) -> tuple[Experiment, pd.DataFrame | None]:
    """``experiment`` with its ``measured`` arms filled from the weights the load step staged.

    Returns
    -------
    (Experiment, pandas.DataFrame or None)
        The filled experiment and the staged rows (``None`` when no arm is measured).
    """
    if not any(a.measured for a in experiment.arms):
        return experiment, None
    rows = pq.read_table(staged.require(staged.measured_weights, step="load")).to_pandas()
    missing = [a.name for a in experiment.arms if a.measured and a.name not in set(rows["arm"])]
    if missing:
        raise InputError(f"{staged.measured_weights}: no measured weights for arm {missing[0]!r}; run the 'load' step again")
    weights = {arm: group.sort_values("position")["weight"].tolist() for arm, group in rows.groupby("arm", sort=False)}
    return experiment.with_position_weights({a.name: weights[a.name] for a in experiment.arms if a.measured}), rows


def run_partition_checks(hook: ResultsHook, *, experiment: Experiment, staged: StagedPartition, ds: dt.date) -> list[CheckResult]:
    """Every check run on one staged (experiment, day) before it is estimated.

    The schema gate (:func:`counterbid.operators.schema_gate.schema_gate`) first; when it passes,
    the full data checks (:func:`counterbid.operators.check_runner.run_checks`) follow on temp
    tables ``staged_day`` and ``staged_history`` (earlier days of the experiment), with measured
    position weights filled from staging.
    """
    results = schema_gate(hook, experiment=experiment, staged=staged)
    if worst_failure(results) == "error":
        return results
    experiment, _ = staged_experiment(experiment, staged)
    with hook.staged_relations(day=staged.day, to_date=staged.require(staged.to_date, step="load"), ds=ds) as con:
        return results + list(run_checks(con, "staged_day", experiment, ds=ds, history_relation="staged_history"))


def store_checks(hook: ResultsHook, results: list[CheckResult], *, experiment_id: str, ds: dt.date, run_id: str) -> None:
    """Store outcomes in the ``data_checks`` table; a failure here is logged, never raised."""
    try:
        hook.record_checks(write_check_results, results, experiment_id=experiment_id, ds=ds, run_id=run_id)
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
    write_json({"status": status, "checks": [asdict(r) | {"details": dict(r.details)} for r in results]}, staged.checks)
    return status


def load_checks(staged: StagedPartition) -> str:
    """Status recorded by the validate step (``'ok'`` or ``'warning'``); refuses ``'error'``."""
    payload = json.loads(staged.require(staged.checks, step="validate").read_text(encoding="utf-8"))
    status = payload.get("status")
    if status not in ("ok", "warning"):
        raise InputError(f"{staged.checks}: checks ended with status {status!r}; this partition is not estimated")
    return status


def estimate_partition(
    hook: ResultsHook,
    *,
    experiment: Experiment,
    ds: dt.date,
    staging_root: str | Path,
    run_id: str,
    confidence_level: float = 0.95,
    cluster: str = "auto",
) -> dict:
    """Estimate every arm from the staged day and the staged experiment-to-date bids.

    Calls :func:`counterbid.estimators.estimate_arms` once per span, with measured position
    weights as the load step staged them, and writes its rows, with the partition keys, status
    and provenance, to the staging folder, with the position weights used.

    Returns
    -------
    dict
        Sample sizes and the revenue estimate per arm (small; logged and returned to XCom).
    """
    staged = StagedPartition.at(staging_root, experiment.id, ds)
    status = load_checks(staged)
    computed_at = pd.Timestamp.now(tz="UTC")
    experiment, measured = staged_experiment(experiment, staged)
    weights_rows = []
    for arm in experiment.arms:
        mine = None if measured is None else measured[measured["arm"] == arm.name].sort_values("position")
        m = mine is not None and len(mine) > 0
        for k, w in enumerate(arm.position_weights, start=1):
            weights_rows.append(dict(
                experiment_id=experiment.id, ds=ds, arm=arm.name, position=k, weight=float(w),
                source="measured" if m else "spec", impressions=int(mine["impressions"].iloc[k - 1]) if m else None,
                clicks=int(mine["clicks"].iloc[k - 1]) if m else None,
                first_click_ds=mine["first_click_ds"].iloc[k - 1] if m else None,
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
        with_stored_columns(table, check_status=status)  # status flags, level and clustering the run used
        table["method_version"] = table.attrs.get("method_version", METHOD_VERSION)
        table["run_id"] = run_id
        table["computed_at"] = computed_at
        write_parquet(pa.Table.from_pandas(table, preserve_index=False), target)
        summary[f"{span}_bids"] = int(table.attrs["n_bids"])
        rev = table[table["metric"] == "revenue_per_auction"].set_index("arm")["estimate"]
        summary[f"{span}_revenue_per_auction"] = {k: round(float(v), 6) for k, v in rev.items()}
    write_parquet(pa.Table.from_pylist(weights_rows), staged.weights)
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
