"""The running window rebuilt from its stored pieces, one bucket of bidders at a time.

A rebuild (a rerun of a day the window holds, an out-of-order or left-out day, a new segment or
bid unit, a key collision, a dropped window) needs every bidder's totals over every window day.
Read whole, the stored ``stratum_piece_bidder_sums`` rows of the earlier days cost memory in
proportion to the window's days. Here they are streamed from the sink in record batches
(:meth:`~counterbid.operators.hooks.ResultsHook.stored_bidder_sum_batches`) and set aside on
disk, together with today's rows, by the bucket of the 64-bit FNV-1a hash of the id text (every
row of one bidder lies in one bucket, whatever its day, shard, stratum or segment; the rebuild
reads no stored key, so it needs no key range, unlike the daily update's buckets in
:mod:`.window_buckets`, and the hash is cheaper than the md5 key). Each bucket's totals per (segment key, bidder) are then added up alone, so
memory is set by a bucket, not by the window.

Rows are kept long (one per piece, bidder and label), weighted on the way by their piece
(``M_s 2**(e_s - e)``, as :func:`counterbid.estimators.bidder_totals` weights them) and tagged
with the piece's rank in the plain formula's order (the stored pieces in their stored order, then
today's): a bucket's rows are put back in that order before they are added, so each bidder's
total adds its pieces in the order the plain formula adds them, and is the same number. Bidders
meet on their id text, never on an integer key, so two ids that share a key stay apart.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.feather as feather

from counterbid.estimators import StratumPiece
from counterbid.estimators.days import parse_day
from counterbid.estimators.errors import InputError
from counterbid.estimators.keyed_gram import bucket_of
from counterbid.readers.id_hashes import fnv1a_64

from .window_buckets import BucketedRows, PieceRows, set_aside

__all__ = ["GATHER_ROWS", "REBUILD_BUCKET_ROWS", "PieceRanks", "WindowRows", "bucket_window", "window_bucket_totals"]

#: Long rows (one per piece, bidder and label) of the window added up in one bucket, on average
#: (about 35 bytes a row, a few copies while ordering and adding: a few hundred MiB).
REBUILD_BUCKET_ROWS = 1_000_000
#: Long rows gathered from the sink before they are split by bucket and written (one group of files).
GATHER_ROWS = 1_000_000
#: Rows of a record batch read from the sink.
STREAM_BATCH_ROWS = 262_144
_NO_SEGMENT = -1


@dataclass(frozen=True)
class WindowRows(BucketedRows):
    """The window's weighted long rows, set aside by bucket (:class:`~.window_buckets.BucketedRows`):
    one row per piece, bidder and label (``label`` ``0 .. width - 1``), ``segment`` the position of
    the piece's segment label in ``segments`` (-1 for none)."""


@dataclass(frozen=True)
class PieceRanks:
    """The stored pieces by key: each one's rank in the plain formula's order and its weight.

    Attributes
    ----------
    codes : numpy.ndarray of int64
        Sorted codes of the pieces' ``(day, segment, n_bidders, shard)``.
    ranks, weights : numpy.ndarray
        Of the piece of each code.
    segments : list of str
    n_span, shard_span : int
        Bounds of ``n_bidders`` and ``shard`` in the codes.
    """

    codes: np.ndarray
    ranks: np.ndarray
    weights: np.ndarray
    segments: list[str]
    n_span: int
    shard_span: int

    @classmethod
    def of(cls, pieces: Sequence[StratumPiece], segments: list[str], exponent: int) -> PieceRanks:
        """Ranks ``0 .. len(pieces) - 1`` in the given order; weights ``M_s 2**(e_s - exponent)``."""
        days = np.array([_day_number(p.key.day) for p in pieces], dtype=np.int64)
        seg = np.array([_segment_code(p.key.segment, segments) for p in pieces], dtype=np.int64)
        n = np.array([int(p.key.n_bidders) for p in pieces], dtype=np.int64)
        shard = np.array([int(p.shard) for p in pieces], dtype=np.int64)
        n_span, shard_span = int(n.max(initial=0)) + 1, int(shard.max(initial=0)) + 1
        codes = _codes(days, seg, n, shard, len(segments), n_span, shard_span)
        order = np.argsort(codes, kind="stable")
        weights = np.array([_weight(p, exponent) for p in pieces], dtype=float)
        return cls(codes[order], order.astype(np.int32), weights[order], list(segments), n_span, shard_span)

    def locate(self, batch: pa.RecordBatch | pa.Table) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Rank, weight and segment code of each stored row's piece (one error line naming a row without one)."""
        days = pc.cast(batch.column("ds"), pa.date32()).to_numpy(zero_copy_only=False).astype("datetime64[D]")
        days = days.astype(np.int64)
        seg_text = pc.cast(batch.column("segment"), pa.string())
        seg = pc.fill_null(pc.index_in(seg_text, value_set=pa.array(self.segments, pa.string())),
                           _NO_SEGMENT).to_numpy(zero_copy_only=False).astype(np.int64)
        unknown_segment = pc.and_(pc.is_valid(seg_text), pc.equal(seg, _NO_SEGMENT)).to_numpy(zero_copy_only=False)
        n = batch.column("n_bidders").to_numpy(zero_copy_only=False).astype(np.int64)
        shard = batch.column("shard").to_numpy(zero_copy_only=False).astype(np.int64)
        inside = ~unknown_segment & (n >= 0) & (n < self.n_span) & (shard >= 0) & (shard < self.shard_span)
        codes = _codes(days, seg, n, shard, len(self.segments), self.n_span, self.shard_span)
        at = np.minimum(np.searchsorted(self.codes, codes), max(self.codes.size - 1, 0))
        found = inside & (self.codes.size > 0) & (self.codes[at] == codes if self.codes.size else False)
        if not found.all():
            row = int(np.flatnonzero(~found)[0])
            raise InputError(f"stratum_piece_bidder_sums: a stored row of day {batch.column('ds')[row].as_py()}, "
                             f"{int(n[row])}-bidder stratum, shard {int(shard[row])}, segment "
                             f"{seg_text[row].as_py()!r} has no stored stratum piece; write the day again")
        return self.ranks[at], self.weights[at], seg


def _day_number(day) -> int:
    return int(np.datetime64(parse_day(day), "D").astype(np.int64))


def _segment_code(segment: str | None, segments: list[str]) -> int:
    return _NO_SEGMENT if segment is None else segments.index(segment)


def _weight(piece: StratumPiece, exponent: int) -> float:
    if int(piece.bid_exponent) > exponent:
        raise InputError(f"bidder totals: a piece is in units of 2**{piece.bid_exponent} bids, above 2**{exponent}")
    return int(piece.n_auctions) * math.ldexp(1.0, int(piece.bid_exponent) - exponent)


def _codes(days, seg, n, shard, n_segments: int, n_span: int, shard_span: int) -> np.ndarray:
    """One int64 per piece key (segment -1 .. n_segments - 1 shifted to 0 ..)."""
    return ((days * (n_segments + 1) + (seg + 1)) * n_span + n) * shard_span + shard


def _long(rank, segment, ids, label, value) -> pa.Table:
    return pa.table({"rank": pa.array(rank, pa.int32()), "segment": pa.array(segment, pa.int16()),
                     "bidder_id": ids, "label": pa.array(label, pa.int8()), "value": pa.array(value, pa.float64())})


def _stored_long(batch: pa.RecordBatch, ranks: PieceRanks, labels: pa.Array) -> pa.Table:
    """One streamed batch of stored rows as weighted long rows."""
    rank, weight, seg = ranks.locate(batch)
    label = pc.index_in(pc.cast(batch.column("arm"), pa.string()), value_set=labels)
    if label.null_count:
        row = int(np.flatnonzero(pc.is_null(label).to_numpy(zero_copy_only=False))[0])
        raise InputError(f"stratum_piece_bidder_sums: a stored row names label {batch.column('arm')[row].as_py()!r}, "
                         f"not one of the experiment's ({', '.join(labels.to_pylist())})")
    value = weight * batch.column("value").to_numpy(zero_copy_only=False).astype(float, copy=False)
    return _long(rank, seg, pc.cast(batch.column("bidder_id"), pa.string()),
                 label.to_numpy(zero_copy_only=False), value)


def _today_long(rank: int, rows: PieceRows, segments: list[str], exponent: int, width: int) -> pa.Table:
    """One of today's pieces (sums in the experiment's label order) as weighted long rows."""
    if rows.bid_exponent > exponent:
        raise InputError(f"bidder totals: a piece is in units of 2**{rows.bid_exponent} bids, above 2**{exponent}")
    if rows.sums.shape[1] != width:
        raise InputError(f"bidder window: a piece of today holds {rows.sums.shape[1]} sums per bidder, not {width}")
    n = len(rows.bidder_ids)
    w = rows.n_auctions * math.ldexp(1.0, rows.bid_exponent - exponent)
    ids = rows.bidder_ids.cast(pa.string())
    ids = pa.chunked_array([c for _ in range(width) for c in (ids.chunks if isinstance(ids, pa.ChunkedArray) else [ids])],
                           pa.string())
    value = np.concatenate([w * rows.sums[:, j] for j in range(width)]) if n else np.zeros(0)
    return _long(np.full(n * width, rank, np.int32), np.full(n * width, _segment_code(rows.segment, segments), np.int16),
                 ids, np.repeat(np.arange(width, dtype=np.int8), n), value)


def bucket_window(stored_batches: Iterable[pa.RecordBatch], stored: Sequence[StratumPiece],
                  today: Iterable[Iterable[tuple[int, PieceRows | StratumPiece]]], folder: Path, *,
                  labels: list[str], segments: list[str], exponent: int, bits: int) -> WindowRows:
    """Set the window's rows aside in ``folder`` by bucket: the stored days' streamed rows, then today's.

    Parameters
    ----------
    stored_batches : iterable of pyarrow.RecordBatch
        The stored bidder sums of the earlier days (``ds``, ``n_bidders``, ``segment``, ``shard``,
        ``bidder_id``, ``arm``, ``value``), in any order.
    stored : sequence of StratumPiece
        The earlier days' stored pieces, in the plain formula's order (their bidder sums unused).
    today : iterable of iterables of (int, PieceRows or StratumPiece)
        Today's pieces with their sums, by group (e.g. shard), each with its position among today's
        pieces (ranked after every stored piece).
    folder : Path
        An empty folder (this function's).
    labels : list of str
        The revenue labels, in the experiment's order (today's sums' columns).
    segments : list of str
        Segment labels of the window's pieces.
    exponent : int
        Unit of the totals (the window's).
    bits : int
        ``2**bits`` buckets (:func:`~counterbid.operators.window_buckets.bucket_bits`).

    Returns
    -------
    WindowRows
    """
    ranks = PieceRanks.of(stored, segments, exponent)
    names = pa.array(labels, pa.string())
    gathered: list[pa.Table] = []
    held, group = 0, 0

    def flush() -> None:
        nonlocal gathered, held, group
        if not held:
            return
        table = pa.concat_tables(gathered)
        gathered, held = [], 0
        set_aside(table, bucket_of(_id_hashes(table.column("bidder_id")), bits), folder, group=group, bits=bits)
        group += 1

    def rows() -> Iterator[pa.Table]:
        for batch in stored_batches:
            yield _stored_long(batch, ranks, names)
        for pieces in today:
            for i, piece in pieces:
                piece = piece if isinstance(piece, PieceRows) else PieceRows.of(piece)
                yield _today_long(len(stored) + int(i), piece, segments, exponent, len(labels))

    for table in rows():
        gathered.append(table)
        held += table.num_rows
        if held >= GATHER_ROWS:
            flush()
    flush()
    return WindowRows(Path(folder), bits, len(labels), list(segments))


def _id_hashes(ids: pa.ChunkedArray) -> np.ndarray:
    """FNV-1a hash of each row's id text, computed once per distinct id (ids repeat across labels and days)."""
    encoded = pc.dictionary_encode(ids.combine_chunks())
    return fnv1a_64(encoded.dictionary)[encoded.indices.to_numpy(zero_copy_only=False)]


def window_bucket_totals(rows: WindowRows, bucket: Path) -> dict[str | None, tuple[pa.Array, np.ndarray]]:
    """The whole-window totals of one bucket's bidders: pooled (key ``None``) and per segment.

    Parameters
    ----------
    rows : WindowRows
    bucket : Path
        One of :meth:`WindowRows.buckets`.

    Returns
    -------
    dict of (str or None) to (pyarrow.Array, numpy.ndarray)
        Each key's bidder ids (text, first seen in the plain order) and their ``(B, width)`` totals;
        a key without rows in the bucket is absent.
    """
    table = pa.concat_tables([feather.read_table(f) for f in sorted(bucket.glob("group-*.arrow"))])
    table = table.take(pa.array(np.argsort(table.column("rank").to_numpy(), kind="stable")))  # the plain order
    segment = table.column("segment").to_numpy()
    out = {}
    for code, key in [(None, None), *enumerate(rows.segments)]:
        part = table if code is None else table.filter(pa.array(segment == code))
        if part.num_rows == 0:
            continue
        ids = pc.dictionary_encode(part.column("bidder_id").combine_chunks())
        index = ids.indices.to_numpy(zero_copy_only=False).astype(np.int64)
        n = len(ids.dictionary)
        cell = index * rows.width + part.column("label").to_numpy().astype(np.int64)
        # bincount adds each cell's values in row order: each bidder's total adds its pieces in the plain order
        sums = np.bincount(cell, weights=part.column("value").to_numpy(), minlength=n * rows.width)
        out[key] = (ids.dictionary, sums.reshape(n, rows.width))
        del part, ids, index, cell
    return out
