"""The write step of one (experiment, day): the staged rows into the results database, in one transaction.

Its own module, apart from :mod:`counterbid.operators.partition`: the write task loads the hooks,
the staged files and the running window, not the checks or the estimator's combination (scipy.stats
and the rest), so under an executor that runs each task in a process of its own the write task
imports less (tests/operators/test_operators.py checks what it loads).
"""

from __future__ import annotations

import datetime as dt
import shutil
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from .hooks import ResultsHook
from .results_schema import staged_rows
from .staging import StagedPartition
from .window_state import PIECE_TABLES, load_window_write

__all__ = ["write_partition"]


def write_partition(
    hook: ResultsHook, *, experiment_id: str, ds: dt.date, staging_root: str | Path, cleanup: bool = True
) -> dict[str, int]:
    """Replace the (experiment, day)'s rows of every results table in one transaction.

    The day's estimates, its experiment-to-date estimates (none when every day so far is left
    out of the window: rows without numbers saying why), position weights, stratum pieces and bid-quantile summary.

    Returns
    -------
    dict of str to int
        Rows written per table.
    """
    staged = StagedPartition.at(staging_root, experiment_id, ds)
    tables: dict[str, pa.Table] = {
        "arm_estimates": pq.read_table(staged.require(staged.estimates_day, step="estimate")),
        "position_weights": pq.read_table(staged.require(staged.weights, step="estimate")),
    }
    for table in PIECE_TABLES.values():  # the per-bidder rows among them: streamed from the file, never read whole
        tables[table] = staged_rows(staged.require(staged.folder / f"{table}.parquet", step="estimate"))
    # optional: absent when every day so far is left out / when the validate step stopped early
    tables["arm_estimates_to_date"] = (pq.read_table(staged.estimates_to_date) if staged.estimates_to_date.exists()
                                       else None)
    tables["bid_quantiles"] = None
    if staged.bid_quantiles.exists():  # staged by 'validate'; stamped with the estimate's provenance
        quantiles, day = pq.read_table(staged.bid_quantiles), tables["arm_estimates"]
        for name in ("run_id", "computed_at"):
            value = day.column(name)[0] if day.num_rows else None
            quantiles = quantiles.append_column(name, pa.array([value.as_py() if value is not None else None] * quantiles.num_rows,
                                                               type=day.schema.field(name).type))
        tables["bid_quantiles"] = quantiles
    counts = hook.replace_partition(experiment_id=experiment_id, ds=ds, tables=tables,
                                    window=load_window_write(staged.folder))
    if cleanup:
        shutil.rmtree(staged.folder, ignore_errors=True)
    return counts
