"""The day's per-bidder sums staged for the write step, one revenue label of one piece at a time.

``stratum_piece_bidder_sums`` holds one row per (bidder, revenue label) of every piece clustered
by bidder. Built as one frame (:func:`counterbid.estimators.pieces_to_frames`), a day of ``B``
bidders and ``L`` labels costs ``B * L`` rows of text in memory at once, and that frame is what
sized the estimate step by the day. Here the rows go straight to Parquet as Arrow columns: each
piece's ids are converted to Arrow once, and every label writes one row group (the ids, the
label, the label's column of sums), so memory is one piece's ids and one column of its sums. The
file holds the same rows, in the same order and with the same column types, as the frame would.
"""

from __future__ import annotations

import datetime as dt
import os
import shutil
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from counterbid.estimators import StratumPiece
from counterbid.estimators._ids import ids_as_text

__all__ = ["BIDDER_SUM_SCHEMA", "repeated", "write_bidder_sum_rows"]

#: Columns of the staged ``stratum_piece_bidder_sums`` rows (as the frame's conversion gave them).
BIDDER_SUM_SCHEMA = pa.schema([
    ("experiment_id", pa.large_string()), ("ds", pa.date32()), ("n_bidders", pa.int64()), ("shard", pa.int64()),
    ("segment", pa.large_string()), ("bidder_id", pa.large_string()), ("arm", pa.large_string()),
    ("value", pa.float64()), ("run_id", pa.large_string()), ("computed_at", pa.timestamp("us", tz="UTC")),
])


def repeated(value, n: int, type_: pa.DataType = pa.string()) -> pa.Array:
    """``value`` ``n`` times as an Arrow array of ``type_`` (``None``: nulls), without a Python list of ``n`` items."""
    if value is None:
        return pa.nulls(n, type_)
    return pa.array([value], type_).take(pa.array(np.zeros(n, dtype=np.int32)))


def _id_text(ids) -> pa.Array | pa.ChunkedArray:
    """Bidder ids as Arrow text: an Arrow string column as it is (no Python strings), else from the id array."""
    if isinstance(ids, (pa.Array, pa.ChunkedArray)):
        return ids.cast(pa.large_string())
    return pa.array(ids_as_text(ids), pa.large_string())


def write_bidder_sum_rows(pieces: Sequence[StratumPiece], target: Path, *, experiment_id: str, ds: dt.date,
                          run_id: str, computed_at) -> int:
    """Write the pieces' bidder sums as rows of ``stratum_piece_bidder_sums`` to ``target`` (atomically).

    Parameters
    ----------
    pieces : sequence of StratumPiece
        Pieces without bidder sums add no rows; ``bidder_ids`` may be an Arrow string column
        (written as it is, without a Python string per bidder).
    target : Path
    experiment_id : str
    ds : datetime.date
    run_id : str
    computed_at : timestamp

    Returns
    -------
    int
        Rows written.
    """
    when = pd.Timestamp(computed_at).tz_convert("UTC").to_pydatetime()
    tmp = target.with_name(f".{target.name}.{os.getpid()}.tmp")
    rows = 0
    try:
        with pq.ParquetWriter(tmp, BIDDER_SUM_SCHEMA) as writer:
            for p in pieces:
                if p.bidder_ids is None:
                    continue
                b = len(p.bidder_ids)
                ids = _id_text(p.bidder_ids)
                constant = {"experiment_id": repeated(experiment_id, b, pa.large_string()),
                            "ds": repeated(ds, b, pa.date32()), "n_bidders": repeated(p.n_bidders, b, pa.int64()),
                            "shard": repeated(p.shard, b, pa.int64()),
                            "segment": repeated(p.key.segment, b, pa.large_string()),
                            "run_id": repeated(run_id, b, pa.large_string()),
                            "computed_at": repeated(when, b, BIDDER_SUM_SCHEMA.field("computed_at").type)}
                for j, (arm, _) in enumerate(p.sum_labels):  # label by label: the frame's row order
                    columns = {**constant, "bidder_id": ids, "arm": repeated(arm, b, pa.large_string()),
                               "value": pa.array(np.ascontiguousarray(p.bidder_sums[:, j]), pa.float64())}
                    writer.write_table(pa.table([columns[f.name] for f in BIDDER_SUM_SCHEMA],
                                                schema=BIDDER_SUM_SCHEMA))
                    rows += b
                del ids, constant
        if target.is_dir():  # the Spark route's folder of shard files, staged by an earlier run
            shutil.rmtree(target)
        os.replace(tmp, target)  # readers see the old file or the new one, never half of one
    finally:
        Path(tmp).unlink(missing_ok=True)
    return rows
