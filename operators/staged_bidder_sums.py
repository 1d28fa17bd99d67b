"""Today's per-bidder rows staged by Spark's executors, and read back shard by shard for the running window.

On Spark, the estimate step's executors write each shard's ``stratum_piece_bidder_sums`` rows
themselves (:class:`ShardRowsSink`, the columns and row order of
:func:`~counterbid.operators.bidder_sum_rows.write_bidder_sum_rows`): one file per shard, in a
folder at the path where the local route stages its one file. The write step reads either alike
(``pyarrow.parquet.read_table`` of a file or of a folder of files). Only the pieces, without their
bidder sums, and the day's bidder forms reach the driver. On a cluster the staging folder must
therefore be a path the executors and the Airflow worker share.

The running window (:mod:`counterbid.operators.window_state`) adds today's bidder sums to the
stored totals, reading them from those files one shard's file at a time
(:func:`~counterbid.operators.window_buckets.staged_piece_rows`, label by label, into buckets of
bidders). :func:`pieces_with_staged_sums` gives the pieces with their sums whole, for a caller
that holds a shard's sums in memory anyway (the Spark benchmark of the window's read-back).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import os
import shutil
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow.compute as pc
import pyarrow.parquet as pq

from counterbid.estimators import StratumPiece
from counterbid.estimators.errors import InputError

from .bidder_sum_rows import write_bidder_sum_rows

__all__ = ["ShardRowsSink", "distinct_bidders", "install_folder", "pieces_with_staged_sums", "shard_file",
           "staged_shards"]

#: Columns read back for the window (the rest are the partition's constants).
_READ = ["n_bidders", "segment", "bidder_id", "arm", "value"]


def shard_file(folder: Path, shard: int) -> Path:
    """The file of one shard's rows in a staged folder."""
    return Path(folder) / f"part-{int(shard):05d}.parquet"


def _counts_file(folder: Path, shard: int) -> Path:
    """One shard's distinct bidders per piece (a leading ``_``: not a data file to Parquet readers)."""
    return Path(folder) / f"_bidders-{int(shard):05d}.json"


@dataclass(frozen=True)
class ShardRowsSink:
    """Writes one shard's bidder-sum rows into ``folder`` (run by the shard's Spark worker; picklable).

    A retried or speculative task rewrites the same file atomically: a reader sees one
    attempt's whole file.
    """

    folder: str
    experiment_id: str
    ds: dt.date
    run_id: str
    computed_at: object

    def __call__(self, shard: int, pieces: Sequence[StratumPiece]) -> int:
        target = shard_file(Path(self.folder), shard)
        target.parent.mkdir(parents=True, exist_ok=True)
        rows = write_bidder_sum_rows(pieces, target, experiment_id=self.experiment_id, ds=self.ds,
                                     run_id=self.run_id, computed_at=self.computed_at)
        counts = [[int(p.n_bidders), p.key.segment, len(p.bidder_ids)] for p in pieces if p.bidder_ids is not None]
        counts_file = _counts_file(Path(self.folder), shard)
        tmp = counts_file.with_name(f".{counts_file.name}.{os.getpid()}.tmp")
        tmp.write_text(json.dumps(counts), encoding="utf-8")
        os.replace(tmp, counts_file)
        return rows


def distinct_bidders(folder: Path) -> dict[tuple[int, int, str | None], int]:
    """Distinct bidders of every staged piece, by (shard, number of bidders, segment)."""
    out = {}
    for path in Path(folder).glob("_bidders-*.json"):
        shard = int(path.stem.split("-")[1])
        for n_bidders, segment, count in json.loads(path.read_text(encoding="utf-8")):
            out[(shard, int(n_bidders), segment)] = int(count)
    return out


def staged_shards(folder: Path) -> set[int]:
    """Shards with a file in ``folder``."""
    return {int(p.stem.split("-")[1]) for p in Path(folder).glob("part-*.parquet")}


def install_folder(tmp: Path, target: Path) -> None:
    """Move the executors' folder ``tmp`` to ``target``, replacing a file or folder an earlier run staged there."""
    if target.is_dir():
        shutil.rmtree(target)
    elif target.exists():
        target.unlink()
    tmp.replace(target)


def pieces_with_staged_sums(pieces: Sequence[StratumPiece], folder: Path) -> list[StratumPiece]:
    """The pieces with their bidder sums read back from the executors' files (bidder ids as text).

    Each shard's file is read once, for that shard's pieces; a piece's rows are those of its
    number of bidders and segment, label by label in the order the worker wrote them (one id
    column per label, the same ids in the same order).

    Parameters
    ----------
    pieces : sequence of StratumPiece
        Today's pieces without bidder sums, by shard.
    folder : Path
        The staged folder of :class:`ShardRowsSink` files.

    Returns
    -------
    list of StratumPiece
        The same pieces, in the same order, each with ``bidder_ids`` and ``bidder_sums``.

    Raises
    ------
    InputError
        A piece has no rows (its shard's file is missing or incomplete): one line naming it.
    """
    by_shard: dict[int, list[int]] = {}
    for i, p in enumerate(pieces):
        by_shard.setdefault(int(p.shard), []).append(i)
    out = list(pieces)
    for shard, indices in sorted(by_shard.items()):
        path = shard_file(folder, shard)
        table = pq.read_table(path, columns=_READ) if path.exists() else None
        for i in indices:
            out[i] = _with_sums(pieces[i], table, path)
        del table
    return out


def _with_sums(piece: StratumPiece, table, path: Path) -> StratumPiece:
    """One piece with its rows of ``table`` (``None``: no file) as bidder ids and sums."""
    labels = [arm for arm, _ in piece.sum_labels]
    columns = []
    ids = None
    if table is not None:
        segment = table.column("segment")
        same = pc.is_null(segment) if piece.key.segment is None else pc.fill_null(pc.equal(segment, piece.key.segment),
                                                                                   False)
        rows = table.filter(pc.and_(pc.equal(table.column("n_bidders"), piece.n_bidders), same))
        for label in labels:
            mine = rows.filter(pc.equal(rows.column("arm"), label))
            if ids is None:
                ids = mine.column("bidder_id")
            if mine.num_rows == 0 or mine.num_rows != len(ids):
                columns = []
                break
            columns.append(mine.column("value").to_numpy())
    if not columns:
        where = "" if piece.key.segment is None else f" of segment {piece.key.segment!r}"
        raise InputError(f"{path}: no staged bidder sums for the {piece.n_bidders}-bidder stratum{where} of shard "
                         f"{piece.shard}; run the estimate step again")
    return dataclasses.replace(piece, bidder_ids=ids.to_numpy(zero_copy_only=False),
                               bidder_sums=np.column_stack(columns))
