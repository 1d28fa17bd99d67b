"""The load step of one (experiment, day): the day's bids from the lake into staging, in shards.

Apart from :mod:`counterbid.operators.partition` (which re-exports these names) so that the load
task imports what loading needs (DuckDB, pyarrow, the spec) and not the estimator, the checks and
scipy.stats of the later steps: under an executor that runs each task in a process of its own,
those imports are most of the load task's cost on a day of a million bids
(tests/benchmarks/bench_dag_scheduler.py).
"""

from __future__ import annotations

import datetime as dt
import shutil
from pathlib import Path
from typing import TYPE_CHECKING

import pyarrow as pa

from counterbid.estimators.errors import InputError
from counterbid.estimators.position_weights import measured_position_weights
from counterbid.estimators.sharding import n_shards
from counterbid.readers.shards import max_bids_per_shard as max_bids_per_shard_setting
from counterbid.readers.shards import write_shards

from .lake_hook import LakeHook
from .staging import StagedPartition, replace_folder, write_json, write_parquet

if TYPE_CHECKING:
    import pandas as pd

    from counterbid.estimators.spec import Experiment

__all__ = ["MissingPartitionError", "stage_measured_weights", "stage_partition"]


class MissingPartitionError(RuntimeError):
    """The day's partition folder does not exist (yet): retryable, unlike bad input."""


def stage_partition(
    lake: LakeHook,
    *,
    lake_root: str | Path,
    experiment: Experiment,
    ds: dt.date,
    staging_root: str | Path,
    clicks_root: str | Path | None = None,
    click_window_days: int = 7,
    max_bids_per_shard: int | str | None = None,
) -> dict:
    """Copy the day's bids of one experiment into staging, split into shards.

    A day with more bids than ``max_bids_per_shard`` (default
    :data:`~counterbid.estimators.MAX_BIDS_PER_SHARD`, or ``$COUNTERBID_MAX_BIDS_PER_SHARD``)
    is split into ``ceil(bids / max)`` shards by the stable hash of the auction id, computed by
    DuckDB as it scans (``sql/lake_read_partition_shards.sql``) and streamed into
    ``day/shard=K/part-0.parquet`` (:func:`counterbid.readers.shards.write_shards`; one batch in memory). Only
    the day is staged: earlier days enter through their stored pieces and bid-quantile summaries.
    When an arm's position weights are ``measured``, they are computed here from the click log,
    once per (experiment, day), and staged for the checks and the estimate
    (:func:`stage_measured_weights`).

    Returns
    -------
    dict
        ``{"day_bids": int, "shards": int, "max_bids_per_shard": int, "folder": str,
        "measured_arms": list}``.
    """
    staged = StagedPartition.at(staging_root, experiment.id, ds)
    max_bids = max_bids_per_shard_setting(max_bids_per_shard)
    day_rows = lake.lake_count_partition(lake_root, experiment_id=experiment.id, ds=ds)
    day_folder = Path(lake_root) / f"ds={ds}"
    if "://" not in str(lake_root):
        if day_rows == 0 and not day_folder.exists():
            # Late data looks like this: raised as a retryable failure that names the folder.
            shutil.rmtree(staged.day, ignore_errors=True)
            raise MissingPartitionError(f"{lake_root}: partition ds={ds} is missing (no such folder)")
        if _linked_parquet(day_folder):
            # DuckDB's recursive glob does not enter linked folders: the day would read as empty, or
            # short by the linked part's bids; refused whole, and no earlier staging of the day outlives it
            shutil.rmtree(staged.day, ignore_errors=True)
            raise InputError(f"{day_folder}: holds Parquet files behind a symbolic link, which the lake's read "
                             "(DuckDB's recursive glob) does not follow; copy or mount the files into the lake instead")
    shards = n_shards(day_rows, max_bids)

    def fill(folder: Path) -> None:  # one batch in memory; an empty day gives one empty shard, for the gate
        with lake.lake_partition_shard_batches(lake_root, experiment_id=experiment.id, ds=ds, n_shards=shards) as batches:
            write_shards(batches, folder, shards)
        # inside the folder, so it is replaced with the shards: what the Spark engine splits the lake into
        write_json({"shards": shards, "day_bids": day_rows, "max_bids_per_shard": max_bids},
                   folder / staged.day_manifest.name)

    replace_folder(fill, staged.day)
    measured = stage_measured_weights(lake, experiment=experiment, ds=ds, staged=staged, clicks_root=clicks_root,
                                      click_window_days=click_window_days)
    return {"day_bids": day_rows, "shards": shards, "max_bids_per_shard": max_bids, "folder": str(staged.folder),
            "measured_arms": [] if measured is None else list(dict.fromkeys(measured["arm"]))}


def _linked_parquet(folder: Path) -> bool:
    """Whether ``folder`` is, or holds, a symbolic link behind which Parquet files lie."""
    if not folder.is_dir():
        return False
    if folder.is_symlink():
        return any(folder.rglob("*.parquet"))
    return any(p.is_symlink() and any(p.rglob("*.parquet")) for p in folder.rglob("*") if p.is_dir())


def stage_measured_weights(
    lake: LakeHook,
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
    clicks = lake.clicks_position_weights(clicks_root, experiment_id=experiment.id, first_ds=first_click, ds=ds)
    fitted = measured_position_weights(clicks, experiment, source=f"{clicks_root} ({first_click}..{ds})")
    fitted["first_click_ds"] = first_click
    write_parquet(pa.Table.from_pandas(fitted, preserve_index=False), staged.measured_weights)
    return fitted
