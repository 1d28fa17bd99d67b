"""The estimate step of one (experiment, day), and its shard tasks: the stratum pieces, the day's and to-date rows.

Its own module, apart from :mod:`counterbid.operators.partition`: the estimate and shard tasks load
the estimator, the readers, the hooks and the running window, not the data checks (nor
``scipy.stats``, nor Great Expectations), so under an executor that runs each task in a process of
its own they import less (tests/operators/test_operators.py checks what the estimate task loads).
:mod:`counterbid.operators.partition` re-exports every name.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import json
import logging
import os
import shutil
import tempfile
from collections.abc import Mapping
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from counterbid.estimators import ArmEstimates, Experiment, StratumPiece, combine_pieces, pieces_to_frames
from counterbid.estimators.errors import InputError
from counterbid.estimators.sequential import planned_days
from counterbid.estimators.window import WINDOW_CHECKS, analysis_window, pending_status
from counterbid.readers.engines import Engine, LocalEngine, SparkEngine, StagedDay
from counterbid.readers.spark_shards import EngineFailure

from .bidder_sum_rows import write_bidder_sum_rows
from .hooks import ResultsHook
from .shard_step import estimate_shard, shard_task_pieces
from .staged_bidder_sums import ShardRowsSink, distinct_bidders, install_folder, staged_shards
from .staging import StagedPartition, write_parquet
from .stored_rows import check_flags, stored_status, with_anytime_columns, with_stored_columns
from .window_state import PIECE_TABLES, stage_window_write, to_date_inputs

__all__ = ["estimate_partition", "estimate_partition_shard", "load_checks", "staged_experiment"]

log = logging.getLogger(__name__)


def staged_experiment(experiment: Experiment, staged: StagedPartition) -> tuple[Experiment, pd.DataFrame | None]:
    """``experiment`` with its ``measured`` arms filled from the weights the load step staged.

    Parameters
    ----------
    experiment : Experiment
        The spec's experiment; arms whose position weights are ``measured`` are filled.
    staged : StagedPartition
        The (experiment, day) staging folder the load step wrote.

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


def load_checks(staged: StagedPartition) -> str:
    """Status recorded by the validate step (``'ok'`` or ``'warning'``); refuses ``'error'``.

    Parameters
    ----------
    staged : StagedPartition
        The (experiment, day) staging folder; its ``checks.json`` must exist (the validate step ran).

    Returns
    -------
    str
        ``'ok'`` or ``'warning'``.

    Raises
    ------
    InputError
        The checks ended with any other status: the partition is not estimated.
    """
    payload = json.loads(staged.require(staged.checks, step="validate").read_text(encoding="utf-8"))
    status = payload.get("status")
    if status not in ("ok", "warning"):
        raise InputError(f"{staged.checks}: checks ended with status {status!r}; this partition is not estimated")
    return status


def _failed_today(staged: StagedPartition) -> list[str]:
    """Checks that failed on the staged day (``checks.json`` of the validate step)."""
    payload = json.loads(staged.require(staged.checks, step="validate").read_text(encoding="utf-8"))
    return sorted({c["check"] for c in payload.get("checks", []) if not c.get("passed", True)})


def _stored_frames(pieces: list[StratumPiece], *, experiment_id: str, ds: dt.date, run_id: str,
                   computed_at, with_sums: bool = True,
                   distinct_bidders: Mapping[tuple, int] | None = None) -> dict[str, pd.DataFrame]:
    """The pieces as rows of the results tables, keyed by (experiment, ds, n_bidders, shard).

    ``with_sums=False``: no bidder-sum rows (:func:`.bidder_sum_rows.write_bidder_sum_rows` stages
    them); the strata rows still count each piece's distinct bidders, from its bidder ids or, for
    pieces whose sums were staged elsewhere, from ``distinct_bidders`` ((shard, n_bidders, segment)
    to count; -1 for a piece without sums).
    """
    out = {}
    frames = pieces_to_frames(pieces if with_sums else [p.without_bidder_sums() for p in pieces])
    if not with_sums:
        frames.pop("bidder_sums")
        frames["strata"]["n_distinct_bidders"] = np.array(
            [(-1 if p.bidder_ids is None else p.bidder_ids.size) if distinct_bidders is None
             else distinct_bidders.get((int(p.shard), int(p.n_bidders), p.key.segment), -1) for p in pieces],
            dtype=np.int64)
    for name, frame in frames.items():
        frame = frame.drop(columns=["day"], errors="ignore")
        frame.insert(0, "experiment_id", experiment_id)
        frame.insert(1, "ds", ds)
        frame["run_id"] = run_id
        frame["computed_at"] = computed_at
        out[PIECE_TABLES[name]] = frame
    return out


def _staged_day(staged: StagedPartition, ds: dt.date, *, manifest: bool) -> StagedDay:
    """The day as the load step staged it: its shards and, with ``manifest``, the number of shards and
    bids the load step recorded (``day/shards.json``; an engine that reads the lake again needs them)."""
    staged.require(staged.day, step="load")
    shards = [(k, staged.shard(k)) for k in staged.shards()]
    if not manifest:
        return StagedDay(ds=ds, shards=shards, n_shards=len(shards), staged_bids=None, source=str(staged.day))
    recorded = json.loads(staged.require(staged.day_manifest, step="load").read_text(encoding="utf-8"))
    return StagedDay(ds=ds, shards=shards, n_shards=int(recorded["shards"]), staged_bids=int(recorded["day_bids"]),
                     source=str(staged.day))


@contextlib.contextmanager
def _sums_staging(target: Path, tag: str, experiment_id: str, ds: dt.date, run_id: str, computed_at):
    """A fresh folder beside ``target`` and a sink staging each shard's bidder-sum rows in it (removed after)."""
    tmp = target.with_name(f".{target.name}.{os.getpid()}.{tag}")
    shutil.rmtree(tmp, ignore_errors=True)
    tmp.mkdir(parents=True)
    try:
        yield tmp, ShardRowsSink(str(tmp), experiment_id=experiment_id, ds=ds, run_id=run_id, computed_at=computed_at)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def _spark_day_pieces(engine: Engine, staged: StagedPartition, ds: dt.date, experiment: Experiment, *, cluster: str,
                      target: Path, run_id: str, computed_at):
    """The day's pieces on Spark, their bidder sums staged at ``target`` by the executors (a folder of shard files).

    Returns the pieces (without bidder sums, with the day's bidder forms when every piece had
    them) and the distinct bidders of each piece whose sums were staged (``None`` when none were).
    The folder replaces what an earlier run staged at ``target`` only once every shard is done.
    """
    with _sums_staging(target, "spark", experiment.id, ds, run_id, computed_at) as (tmp, sink):
        found = engine.day_pieces(_staged_day(staged, ds, manifest=True), experiment, cluster=cluster,
                                  bidder_rows_sink=sink)
        if found.gram is None:  # some shard kept no bidder sums: the day combines by auction, as locally
            return found, None
        missing = sorted({int(p.shard) for p in found.pieces} - staged_shards(tmp))
        if missing:
            raise EngineFailure(f"{staged.day}: the Spark engine lost the staged bidder sums of shard {missing[0]} "
                                "(a task's output is missing); run the estimate step again")
        distinct = distinct_bidders(tmp)
        install_folder(tmp, target)
    return found, distinct


def _shard_task_day(staged: StagedPartition, experiment: Experiment, ds: dt.date, *, cluster: str, target: Path,
                    run_id: str, computed_at):
    """The pieces the shard tasks stored; with several shards, their bidder sums staged at ``target`` shard by shard.

    As on Spark (:func:`_spark_day_pieces`): the rows of ``stratum_piece_bidder_sums`` go to a folder
    of one file per shard, written from each shard's stored sums in turn, and the pieces come back
    without sums, with the day's bidder forms; the distinct bidders of each piece whose sums were
    staged (``None`` when none were: one shard, or a piece without sums).
    """
    with _sums_staging(target, "shards", experiment.id, ds, run_id, computed_at) as (tmp, sink):
        with tempfile.TemporaryDirectory(prefix="counterbid-bidder-sums-") as spill_folder:
            found = shard_task_pieces(staged, experiment, cluster=cluster, spill_folder=Path(spill_folder),
                                      bidder_rows_sink=sink)
        if not staged_shards(tmp):  # the pieces kept their sums (or had none)
            return found, None
        distinct = distinct_bidders(tmp)
        install_folder(tmp, target)
    return found, distinct


def _engine(spark, lake_root) -> Engine:
    if spark is None:
        return LocalEngine()
    if lake_root in (None, ""):
        raise InputError("the Spark engine reads the day from the bid lake: `lake_root` is required")
    return SparkEngine(spark, str(lake_root))


def _horizon_auctions(experiment: Experiment, pieces: list[StratumPiece], n_days: int) -> int:
    """Auctions at the planned last look: planned days x the mean auctions of the days used so far."""
    return max(1, round(planned_days(experiment) * sum(p.n_auctions for p in pieces) / n_days))


def estimate_partition(
    hook: ResultsHook,
    *,
    experiment: Experiment,
    ds: dt.date,
    staging_root: str | Path,
    run_id: str,
    confidence_level: float = 0.95,
    cluster: str = "auto",
    spark=None,
    lake_root: str | Path | None = None,
    shard_tasks: bool = False,
) -> dict:
    """Estimate every arm of one (experiment, day) shard by shard; combine the day and the experiment to date.

    Each staged shard is read, validated and estimated alone
    (:class:`counterbid.readers.engines.LocalEngine`), keeping only its stratum pieces. With a
    Spark session (``spark``, :class:`counterbid.readers.engines.SparkEngine`) Spark reads the
    day's partition of the lake itself, splits it into the shards the load step staged and
    estimates them in parallel: the same pieces; the rest of the step is the same code. The day's
    rows combine the day's pieces (:func:`counterbid.estimators.combine_pieces`); the
    experiment-to-date rows combine the stored pieces of the earlier days in the analysis window
    (:func:`counterbid.estimators.window.analysis_window`: by default without the days whose
    warm-up or drift check failed, and the spec's ``burn_in_days`` and ``exclude_days``) with
    today's, read from the results database -- never bids. Writes the pieces, both sets of rows
    (with the partition keys, status, provenance, and the days used and left out) and the
    position weights used to the staging folder.

    Parameters
    ----------
    spark : pyspark.sql.SparkSession, optional
        Estimate on Spark (default: locally, from the staged shards).
    lake_root : str or Path, optional
        Root of the bid lake Spark reads the day from; required with ``spark``.
    shard_tasks : bool
        The shards were estimated by tasks of their own (:func:`estimate_partition_shard`, one
        mapped task per shard): combine the pieces they stored
        (:func:`counterbid.operators.shard_step.shard_task_pieces`, which refuses a shard whose
        pieces are missing) instead of estimating the shards here. The same rows. A day staged
        as one shard has no shard task (:func:`counterbid.operators.shard_step.validated_shards`):
        it is estimated here, as without ``shard_tasks``.

    Returns
    -------
    dict
        Sample sizes, shards, the engine, the window and the revenue estimate per arm (small;
        logged and returned to XCom).
    """
    if shard_tasks and spark is not None:
        raise InputError("the shards are estimated either by shard tasks or on Spark, not both")
    engine = _engine(spark, lake_root)
    staged = StagedPartition.at(staging_root, experiment.id, ds)
    status = load_checks(staged)
    # one shard is within one task's budget: estimated here, its bidder sums never staged and read back
    shard_tasks = shard_tasks and len(staged.shards()) > 1
    failed_today = _failed_today(staged)
    computed_at = pd.Timestamp.now(tz="UTC")
    experiment, measured = staged_experiment(experiment, staged)
    weights_rows = _weight_rows(experiment, measured, ds=ds, run_id=run_id, computed_at=computed_at)
    sums_file = staged.folder / f"{PIECE_TABLES['bidder_sums']}.parquet"
    distinct = None  # on Spark: the pieces' distinct bidders, counted by the executors that staged their sums
    if shard_tasks:  # the day's bidder forms added bucket by bucket from hashed ids, not by matching text
        found, distinct = _shard_task_day(staged, experiment, ds, cluster=cluster, target=sums_file, run_id=run_id,
                                          computed_at=computed_at)
    elif engine.name == "spark":
        found, distinct = _spark_day_pieces(engine, staged, ds, experiment, cluster=cluster, target=sums_file,
                                            run_id=run_id, computed_at=computed_at)
    else:
        found = engine.day_pieces(_staged_day(staged, ds, manifest=False), experiment, cluster=cluster)
    pieces = found.pieces
    day_result = combine_pieces(pieces, experiment, confidence_level=confidence_level, cluster=cluster,
                                n_excluded_auctions=found.n_excluded_auctions, source=str(staged.day),
                                bidder_gram=found.gram, segment_grams=found.segment_grams)
    if day_result.cluster == "auction":  # bidder sums not used: not stored either
        pieces = [p.without_bidder_sums() for p in pieces]
        distinct = None
    frames = _stored_frames(pieces, experiment_id=experiment.id, ds=ds, run_id=run_id, computed_at=computed_at,
                            with_sums=False, distinct_bidders=distinct)
    for table, frame in frames.items():
        write_parquet(pa.Table.from_pandas(frame, preserve_index=False), staged.folder / f"{table}.parquet")
    if distinct is None:  # label by label, never the day's rows at once (on Spark: the executors wrote them)
        write_bidder_sum_rows(pieces, sums_file, experiment_id=experiment.id, ds=ds, run_id=run_id,
                              computed_at=computed_at)

    # The analysis window: earlier days with stored pieces, minus burn-in, excluded and failed days.
    earlier = hook.stored_piece_days(experiment_id=experiment.id, ds=ds)
    failed = hook.window_failures(experiment_id=experiment.id, ds=ds, checks=list(WINDOW_CHECKS))
    failed[ds] = failed_today
    window = analysis_window([*earlier, ds], experiment, failed_checks=failed)
    used_before = [d for d in window.used if d != ds]
    # the stored pieces' small tables, and the running bidder window (read for today's bidders only,
    # bucket by bucket, when the window is the stored one plus today; rebuilt from the stored pieces
    # otherwise); today's sums staged by shard (Spark, shard tasks) are read back one shard at a time
    with tempfile.TemporaryDirectory(prefix=".window-", dir=staged.folder) as work:
        inputs = to_date_inputs(hook, experiment=experiment, used_before=used_before, today=pieces,
                                today_in_window=ds in window.used, ds=ds, cluster=cluster, run_id=run_id,
                                computed_at=computed_at, today_sums=None if distinct is None else sums_file,
                                work_folder=Path(work))
        stage_window_write(inputs.write, staged.folder)
    to_date_pieces = inputs.pieces

    summary = {"experiment_id": experiment.id, "ds": ds.isoformat(), "status": status, "shards": found.shards,
               "engine": engine.name, "days_used": window.days_used, "days_left_out": window.days_left_out,
               "bidder_window": inputs.route}
    results: dict[str, ArmEstimates] = {"day": day_result}
    horizon = None
    if to_date_pieces:
        to_date_cluster = cluster
        if cluster == "bidder" and inputs.route == "by_auction":
            # a day of the window was estimated clustered by auction (no bidder sums stored):
            # the days can only be combined by auction; the rows say so in their `cluster` column
            log.warning("%s to %s: a day of the window has no bidder sums; combining by auction", experiment.id, ds)
            to_date_cluster = "auction"
        results["to_date"] = combine_pieces(to_date_pieces, experiment, confidence_level=confidence_level,
                                            cluster=to_date_cluster, source=f"{experiment.id} to {ds}",
                                            bidder_gram=inputs.gram, segment_grams=inputs.segment_grams or None)
        horizon = _horizon_auctions(experiment, to_date_pieces, len(window.used))
    tables = _result_tables(results, summary, experiment_id=experiment.id, ds=ds, window=window, status=status,
                            failed_today=failed_today, horizon=horizon, run_id=run_id, computed_at=computed_at)
    if "to_date" not in tables:  # no day of the window is used yet: rows without numbers, saying why
        tables["to_date"] = _pending_rows(tables["day"], window, stored_status(status, pending_status(window),
                                                                              flags=check_flags(failed_today)))
        summary["to_date_status"] = pending_status(window)
    write_parquet(pa.Table.from_pandas(tables["day"], preserve_index=False), staged.estimates_day)
    to_date = pa.Table.from_pandas(tables["to_date"], preserve_index=False)
    if not window.used:  # first_ds is all null: keep its type a date for both sinks
        to_date = to_date.set_column(to_date.schema.get_field_index("first_ds"), "first_ds",
                                     pa.nulls(to_date.num_rows, type=pa.date32()))
    write_parquet(to_date, staged.estimates_to_date)
    write_parquet(pa.Table.from_pylist(weights_rows), staged.weights)
    return summary


def _weight_rows(experiment: Experiment, measured: pd.DataFrame | None, *, ds: dt.date, run_id: str,
                 computed_at) -> list[dict]:
    """The position weights the day was estimated with, one row per (arm, position): the spec's or the measured."""
    rows = []
    for arm in experiment.arms:
        mine = None if measured is None else measured[measured["arm"] == arm.name].sort_values("position")
        m = mine is not None and len(mine) > 0
        for k, w in enumerate(arm.position_weights, start=1):
            rows.append(dict(
                experiment_id=experiment.id, ds=ds, arm=arm.name, position=k, weight=float(w),
                source="measured" if m else "spec", impressions=int(mine["impressions"].iloc[k - 1]) if m else None,
                clicks=int(mine["clicks"].iloc[k - 1]) if m else None,
                first_click_ds=mine["first_click_ds"].iloc[k - 1] if m else None,
                run_id=run_id, computed_at=computed_at))
    return rows


def _result_tables(results: dict[str, ArmEstimates], summary: dict, *, experiment_id: str, ds: dt.date, window,
                   status: str, failed_today: list[str], horizon: int | None, run_id: str,
                   computed_at) -> dict[str, pd.DataFrame]:
    """The day's and the experiment-to-date rows as stored (keys, window, status flags, anytime bounds,
    provenance); each span's bids and pooled revenue per arm are added to ``summary``."""
    tables = {}
    for span, result in results.items():
        table = result.to_frame()
        table.insert(0, "experiment_id", experiment_id)
        table.insert(1, "ds", ds)
        if span == "to_date":
            table.insert(2, "first_ds", window.used[0] if window.used else None)
            table["days_used"] = window.days_used
            table["days_left_out"] = window.days_left_out
            table["n_days_used"] = len(window.used)
            table["n_days_left_out"] = len(window.left_out)
        # status flags (a failed check's own flag, e.g. heterogeneous_auctions), level and clustering the run used
        with_stored_columns(table, result, check_status=status, flags=check_flags(failed_today))
        if span == "to_date":
            with_anytime_columns(table, result, horizon_auctions=horizon)
        table["method_version"] = result.method_version
        table["run_id"] = run_id
        table["computed_at"] = computed_at
        tables[span] = table
        summary[f"{span}_bids"] = result.n_bids
        rev = table[(table["metric"] == "revenue_per_auction") & table["segment"].isna()].set_index("arm")["estimate"]
        summary[f"{span}_revenue_per_auction"] = {k: round(float(v), 6) for k, v in rev.items()}
    return tables


def estimate_partition_shard(experiment: Experiment, *, ds: dt.date, staging_root: str | Path, shard: int,
                             cluster: str = "auto") -> dict:
    """Estimate one staged shard of a checked (experiment, day) and store its pieces (one shard task).

    Refuses a partition whose checks failed (:func:`load_checks`); fills measured position
    weights from staging; then :func:`counterbid.operators.shard_step.estimate_shard`. A rerun
    replaces the shard's pieces.

    Parameters
    ----------
    experiment : Experiment
        The spec's experiment.
    ds : datetime.date
        The day.
    staging_root : str or Path
        Root of the staging folders (the load step's).
    shard : int
        The staged shard to estimate.
    cluster : {'auto', 'auction', 'bidder'}
        Clustering of the standard errors, as for the estimate step.

    Returns
    -------
    dict
        Small: the shard, its pieces, bids and excluded auctions, and where the pieces are.
    """
    staged = StagedPartition.at(staging_root, experiment.id, ds)
    load_checks(staged)
    experiment, _ = staged_experiment(experiment, staged)
    return estimate_shard(experiment, ds=ds, staging_root=staging_root, shard=shard, cluster=cluster)


def _pending_rows(day: pd.DataFrame, window, status: str) -> pd.DataFrame:
    """Experiment-to-date rows of a day whose window uses no day yet: the day's (arm, metric) rows, no numbers.

    Estimate, standard error, interval and anytime bounds are null, counts 0, ``first_ds`` null,
    ``status`` says why (``warming_up``, ...); level, clustering, rule and floor are the day's, so
    the views and the report read them like any other rows.
    """
    rows = day.copy()
    for column in ("estimate", "std_error", "ci_low", "ci_high", "anytime_low", "anytime_high"):
        rows[column] = float("nan")
    rows["n_auctions"] = 0
    rows["n_bids"] = 0
    rows["status"] = status
    rows.insert(2, "first_ds", None)
    rows["days_used"] = window.days_used
    rows["days_left_out"] = window.days_left_out
    rows["n_days_used"] = 0
    rows["n_days_left_out"] = len(window.left_out)
    rows["anytime_horizon_auctions"] = pd.array([None] * len(rows), dtype="Int64")
    return rows
