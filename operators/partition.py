"""One (experiment, day) through the pipeline: stage, check, estimate, write.

Each function does one step for one partition and is what one operator calls. Bid frames never
travel through XCom: every step reads and writes files of a per-(experiment, day) staging folder
(:mod:`counterbid.operators.staging`), and the last step replaces the partition's rows in the
results database in one transaction and removes the folder.
"""

from __future__ import annotations

import datetime as dt
import logging
from dataclasses import asdict
from pathlib import Path

import pandas as pd
import pyarrow as pa

from counterbid.estimators import CheckResult, Experiment, load_experiments, parse_day, worst_failure
from counterbid.estimators.checks import bid_quantile_summary, check_config
from counterbid.estimators.window import WINDOW_CHECKS, analysis_window

from .check_runner import run_checks, write_check_results
from .estimate_step import (  # the estimate step and its shard tasks (a module of their own: no checks loaded)
    _stored_frames,
    estimate_partition,
    estimate_partition_shard,
    load_checks,
    staged_experiment,
)
from .hooks import ResultsHook
from .lake_hook import LakeHook
from .load_step import MissingPartitionError, stage_measured_weights, stage_partition
from .schema_gate import schema_gate
from .staging import StagedPartition, write_json, write_parquet
from .window_state import PIECE_TABLES
from .write_step import write_partition

__all__ = [
    "MissingPartitionError",
    "PIECE_TABLES",
    "active_experiment_ids",
    "estimate_partition",
    "estimate_partition_shard",
    "load_checks",
    "record_checks",
    "run_partition_checks",
    "stage_measured_weights",
    "stage_partition",
    "stage_bid_quantiles",
    "staged_experiment",
    "store_checks",
    "trailing_history",
    "write_partition",
]

log = logging.getLogger(__name__)


def active_experiment_ids(spec_path: str | Path, ds: object) -> list[str]:
    """Ids of the experiments of ``spec_path`` that run on day ``ds``, in file order."""
    day = parse_day(ds)
    return [e.id for e in load_experiments(spec_path).values() if e.is_active(day)]


def run_partition_checks(hook: ResultsHook, lake: LakeHook, *, experiment: Experiment, staged: StagedPartition,
                         ds: dt.date) -> list[CheckResult]:
    """Every check run on one staged (experiment, day) before it is estimated.

    The schema gate (:func:`counterbid.operators.schema_gate.schema_gate`) first; when it passes,
    the full data checks (:func:`counterbid.operators.check_runner.run_checks`) follow on the view
    ``staged_day`` (every shard's files, streamed: nothing of the day is copied into memory), with
    measured position weights filled from staging. When the day has several shards, the contract
    suite, the auction counts and the scan for outlying bids run shard by shard (views
    ``staged_shard_K``; an auction lies in one shard, so the outcomes add up to the whole day's),
    and the distribution checks and the day's bid-quantile summary read shard 0 alone, or the
    first shard after it holding an auction with two bids or more (view ``staged_sample``: a hash
    sample of whole auctions, at least about half of ``max_bids_per_shard`` bids), so memory is
    set by one shard; the counting checks stay exact over the whole day. The
    drift check compares the day with the bid-quantile summaries, stored in the results database,
    of the trailing days that are in the analysis window (a warm-up day, a drifted day, a burn-in
    or excluded day is no reference: after a warm-up the first adapted day has nothing to compare
    with, and a market that stays moved stops being flagged once the old days leave the trailing
    window). When no error check failed, the day's own summary is staged
    (``bid_quantiles.parquet``) for the write step to store. ``hook`` (the results sink) gives the
    stored history; ``lake`` reads the staged files, in DuckDB's dialect whatever the sink.
    """
    results = schema_gate(lake, experiment=experiment, staged=staged)
    if worst_failure(results) == "error":
        return results
    experiment, _ = staged_experiment(experiment, staged)
    history = trailing_history(hook, experiment=experiment, ds=ds)
    staged.bid_quantiles.unlink(missing_ok=True)
    shards = staged.shards()
    # several shards: the distribution checks and the summary read one shard alone (a hash sample of
    # whole auctions), so the frame in memory is one shard; the counting checks count the whole day.
    # The sample is shard 0, or the first shard after it holding an auction with two bids or more.
    sampled = len(shards) > 1
    sample = next((k for k in shards if lake.staged_shard_has_auctions(staged.shard(k) / "*.parquet")),
                  shards[0]) if sampled else None
    sample_files = str(staged.shard(sample) / "*.parquet") if sampled else None
    # one view per shard: the per-auction statements (contract, counts, outlier scan) run shard by shard
    by_shard = {f"staged_shard_{k}": str(staged.shard(k) / "*.parquet") for k in shards} if sampled else None
    summaries: list[pd.DataFrame] = []  # the day's bid-quantile summary, of the frame the checks read

    def summarise(bids: pd.DataFrame) -> None:
        summaries.append(bid_quantile_summary(bids, experiment, source=str(staged.shard(sample) if sampled else staged.day)))

    with lake.staged_relations(day=staged.day_files, sample=sample_files, shards=by_shard) as con:
        results += list(run_checks(con, "staged_day", experiment, ds=ds, history_quantiles=history,
                                   sample_relation="staged_sample" if sampled else None,
                                   sample_shard=(sample, len(shards)) if sampled else None,
                                   shard_relations=by_shard, on_bids=summarise))
    stage_bid_quantiles(staged, summaries, results, experiment_id=experiment.id, ds=ds)
    return results


def trailing_history(hook: ResultsHook, *, experiment: Experiment, ds: dt.date) -> pd.DataFrame | None:
    """The stored bid-quantile summaries the drift check compares ``ds`` with (both engines' validate step).

    The ``drift.trailing_days`` days before ``ds`` that are in the analysis window; ``None`` when there is none.
    """
    cfg = check_config(experiment.checks, source=f"experiment {experiment.id!r} checks")
    first = ds - dt.timedelta(days=int(cfg["drift"]["trailing_days"]))
    history = hook.trailing_bid_quantiles(experiment_id=experiment.id, first_day=first, ds=ds)
    if history is not None:  # compare with the trailing days of the analysis window only
        history_days = [parse_day(d) for d in history["ds"]]
        failed = hook.window_failures(experiment_id=experiment.id, ds=ds, checks=list(WINDOW_CHECKS))
        kept = set(analysis_window(history_days, experiment, failed_checks=failed).used)
        history = history[[d in kept for d in history_days]]
        history = None if history.empty else history
    return history


def stage_bid_quantiles(staged: StagedPartition, summaries: list[pd.DataFrame], results: list[CheckResult], *,
                        experiment_id: str, ds: dt.date) -> None:
    """Stage the day's bid-quantile summary for the write step, when one was made and no error check failed."""
    if summaries and worst_failure(results) != "error":
        summary = summaries[0]
        summary.insert(0, "experiment_id", experiment_id)
        summary.insert(1, "ds", ds)
        write_parquet(pa.Table.from_pandas(summary, preserve_index=False), staged.bid_quantiles)


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
