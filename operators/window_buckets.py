"""Today's bidder totals for the running window, one bucket of bidders at a time.

The daily update of the running window (:mod:`counterbid.operators.window_state`, route
``extended``) looks up today's bidders in ``bidder_window_totals``, adds today's sums and stages
their new totals. Done for the whole day at once, it holds every one of today's ids as text
several times over. Here today's per-bidder rows are set aside on disk first, one group of pieces
(one shard) at a time, split by the top bits of the window's integer key of the id
(:func:`.window_keys.window_keys`, :func:`.window_keys.key_buckets`: a bucket is a range of the
key the stored totals carry, so a bucket's lookup skips the stored row groups of other buckets'
keys): every row of one bidder lies in one bucket,
whatever its shard or stratum, so a bucket's totals (:func:`bucket_totals`) are those bidders'
whole-day totals, and the update runs bucket by bucket with memory set by a bucket. Rows are
weighted by their stratum on the way (``M_s 2**(e_s - e)``, as
:func:`counterbid.estimators.bidder_totals` weights them) and kept in the order they came, so each
bidder's total adds its pieces in the order the plain formula adds them.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.feather as feather
import pyarrow.parquet as pq

from counterbid.estimators import StratumPiece
from counterbid.estimators._ids import ids_as_text
from counterbid.estimators.errors import InputError
from counterbid.estimators.window_totals import WindowTotals

from .bidder_sum_rows import repeated
from .window_keys import key_buckets, window_keys

__all__ = ["WINDOW_BUCKET_ROWS", "BucketedRows", "PieceRows", "TodayRows", "bucket_bits", "bucket_today", "bucket_totals",
           "set_aside", "staged_piece_rows"]

#: Today's (piece, bidder) rows looked up and added in one bucket, on average (about 100 bytes a
#: row with its id text and four labels, a few copies while grouping: well under 0.5 GiB).
WINDOW_BUCKET_ROWS = 1_000_000
#: At most ``2**MAX_BITS`` buckets (a folder of files per bucket).
MAX_BITS = 10


def bucket_bits(n_rows: int, bucket_rows: int) -> int:
    """The least ``bits`` with ``n_rows / 2**bits <= bucket_rows`` (at most :data:`MAX_BITS`).

    Parameters
    ----------
    n_rows : int
        Today's (piece, bidder) rows.
    bucket_rows : int
        Rows wanted per bucket, on average; at least 1.

    Returns
    -------
    int
    """
    if int(bucket_rows) < 1:
        raise InputError(f"bidder window: rows per bucket must be at least 1, got {bucket_rows}")
    need = max(1, math.ceil(int(n_rows) / int(bucket_rows)))
    return min(MAX_BITS, (need - 1).bit_length())


@dataclass(frozen=True)
class BucketedRows:
    """Rows set aside in ``folder`` by :func:`set_aside`: ``bucket-B/group-G.arrow`` for the buckets that hold rows.

    Attributes
    ----------
    folder : Path
    bits : int
        ``2**bits`` buckets.
    width : int
        Revenue labels (sum columns), in the experiment's order.
    segments : list of str
        Segment labels of the rows.
    """

    folder: Path
    bits: int
    width: int
    segments: list[str]

    def buckets(self) -> Iterator[Path]:
        """The folders of the buckets holding rows, in bucket order."""
        yield from sorted(self.folder.glob("bucket-*"))


@dataclass(frozen=True)
class TodayRows(BucketedRows):
    """Today's weighted per-bidder rows, set aside by bucket (:class:`BucketedRows`; their sums in
    columns ``sum_0 ..``, one per revenue label, and ``segments`` today's segment labels).

    Attributes
    ----------
    bid_exponent : int
        Unit of the weighted sums.
    """

    bid_exponent: int


@dataclass(frozen=True)
class PieceRows:
    """One piece's bidders: its segment, weight inputs, ids as Arrow text and ``(B, K + 1)`` sums."""

    segment: str | None
    n_auctions: int
    bid_exponent: int
    bidder_ids: pa.Array | pa.ChunkedArray
    sums: np.ndarray

    @classmethod
    def of(cls, piece: StratumPiece) -> PieceRows:
        """A piece that carries its bidder sums."""
        if piece.bidder_ids is None or piece.bidder_sums is None:
            raise InputError(f"bidder window: the piece of {piece.key.describe()} has no bidder sums")
        return cls(piece.key.segment, int(piece.n_auctions), int(piece.bid_exponent),
                   pa.array(ids_as_text(piece.bidder_ids), pa.string()), piece.bidder_sums)


def _weighted(pieces: Iterable[PieceRows | StratumPiece], exponent: int) -> pa.Table | None:
    """One group's rows: segment, id text and each label's sum times the piece's weight."""
    parts = []
    for p in pieces:
        p = p if isinstance(p, PieceRows) else PieceRows.of(p)
        if p.bid_exponent > exponent:
            raise InputError(f"bidder totals: a piece is in units of 2**{p.bid_exponent} bids, above 2**{exponent}")
        n = len(p.bidder_ids)
        w = p.n_auctions * math.ldexp(1.0, p.bid_exponent - exponent)
        columns = {"segment": repeated(p.segment, n), "bidder_id": p.bidder_ids.cast(pa.string())}
        columns |= {f"sum_{j}": pa.array(w * p.sums[:, j], pa.float64()) for j in range(p.sums.shape[1])}
        parts.append(pa.table(columns))
        del p
    return pa.concat_tables(parts) if parts else None


def staged_piece_rows(pieces: Sequence[StratumPiece], path: Path) -> Iterator[PieceRows]:
    """The pieces' bidder rows from one shard's staged ``stratum_piece_bidder_sums`` file, label by label.

    Each label's rows of a piece are read alone (row groups pruned by the piece's number of
    bidders, segment and label), so memory is one label's column of one piece, with the ids kept
    as Arrow text (the rows of every label hold the same ids in the same order).

    Parameters
    ----------
    pieces : sequence of StratumPiece
        One shard's pieces (their sums staged in ``path``).
    path : Path

    Yields
    ------
    PieceRows

    Raises
    ------
    InputError
        A piece lacks rows of a label, or its labels hold different numbers of rows: one line naming it.
    """
    for piece in pieces:
        segment = pc.field("segment")
        same = pc.field("n_bidders") == int(piece.n_bidders)
        same = same & (segment.is_null() if piece.key.segment is None else segment == piece.key.segment)
        ids, columns = None, []
        for label, _ in piece.sum_labels:
            rows = pq.read_table(path, columns=["bidder_id", "value"], filters=same & (pc.field("arm") == label)) \
                if path.exists() else None
            if rows is None or rows.num_rows == 0 or (ids is not None and rows.num_rows != len(ids)):
                where = "" if piece.key.segment is None else f" of segment {piece.key.segment!r}"
                raise InputError(f"{path}: no staged bidder sums for the {piece.n_bidders}-bidder stratum{where} of "
                                 f"shard {piece.shard}; run the estimate step again")
            ids = rows.column("bidder_id") if ids is None else ids
            columns.append(rows.column("value").to_numpy())
            del rows
        yield PieceRows(piece.key.segment, int(piece.n_auctions), int(piece.bid_exponent), ids,
                        np.column_stack(columns))


def bucket_today(groups: Iterable[Iterable[PieceRows | StratumPiece]], folder: Path, *, exponent: int, bits: int) -> TodayRows:
    """Set today's per-bidder rows aside in ``folder``, one group of pieces (e.g. a shard) at a time.

    Parameters
    ----------
    groups : iterable of iterables of PieceRows or StratumPiece
        Today's pieces, with bidder sums, in the order the plain totals add them; each group is
        read, split and written before the next is asked for.
    folder : Path
        An empty folder (this function's).
    exponent : int
        Unit of the totals (the window's).
    bits : int
        ``2**bits`` buckets (:func:`bucket_bits`).

    Returns
    -------
    TodayRows
    """
    width, segments = None, set()
    for g, pieces in enumerate(groups):
        table = _weighted(pieces, exponent)
        if table is None:
            continue
        width = table.num_columns - 2
        segments |= set(pc.unique(table.column("segment")).drop_null().to_pylist())
        set_aside(table, key_buckets(window_keys(table.column("bidder_id")), bits), folder, group=g, bits=bits)
        del table
    return TodayRows(Path(folder), bits, width or 0, sorted(segments), exponent)


def set_aside(table: pa.Table, bucket: np.ndarray, folder: Path, *, group: int, bits: int) -> None:
    """Write the rows of ``table`` into ``folder/bucket-B/group-G.arrow`` by their ``bucket``.

    Parameters
    ----------
    table : pyarrow.Table
    bucket : numpy.ndarray of int64
        One per row, in ``0 .. 2**bits - 1``, a function of the row's id text only (so every row
        of one bidder lands in one bucket): the daily update's key range
        (:func:`~counterbid.operators.window_keys.key_buckets`), or the rebuild's hash bucket.
    folder : Path
    group : int
        Number of this group of rows (its file name in each bucket's folder).
    bits : int
        ``2**bits`` buckets; within a bucket the rows keep their order.
    """
    order = np.argsort(bucket, kind="stable")
    bounds = np.searchsorted(bucket[order], np.arange(2 ** bits + 1))
    table = table.take(pa.array(order))
    del bucket, order
    for b in np.flatnonzero(np.diff(bounds)):
        place = Path(folder) / f"bucket-{int(b):05d}"
        place.mkdir(parents=True, exist_ok=True)
        feather.write_feather(table.slice(int(bounds[b]), int(bounds[b + 1] - bounds[b])),
                              place / f"group-{group:05d}.arrow", compression="uncompressed")


def bucket_totals(rows: TodayRows, bucket: Path) -> dict[str | None, WindowTotals]:
    """The whole-day totals of one bucket's bidders: pooled (key ``None``) and per segment.

    Parameters
    ----------
    rows : TodayRows
    bucket : Path
        One of :meth:`TodayRows.buckets`.

    Returns
    -------
    dict of (str or None) to WindowTotals
        Bidders in first-seen order; a key without rows in the bucket is absent.
    """
    table = pa.concat_tables([feather.read_table(f) for f in sorted(bucket.glob("group-*.arrow"))])
    out = {}
    for key in [None, *rows.segments]:
        part = table if key is None else table.filter(pc.fill_null(pc.equal(table.column("segment"), key), False))
        if part.num_rows == 0:
            continue
        codes, uniques = pd.factorize(part.column("bidder_id").to_numpy(zero_copy_only=False), sort=False)
        sums = np.column_stack([np.bincount(codes, weights=part.column(f"sum_{j}").to_numpy(), minlength=len(uniques))
                                for j in range(rows.width)])
        out[key] = WindowTotals(bidder_ids=np.asarray(uniques, dtype=object), sums=sums, bid_exponent=rows.bid_exponent)
    return out
