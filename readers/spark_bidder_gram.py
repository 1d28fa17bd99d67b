"""Bidder clustering on Spark: per-bidder sums added on the executors, only their Gram form reaches the driver.

Bidder clustering needs ``sum_b U_b U_b'`` over the distinct bidders ``b`` of the input, with
``U_b = sum_s M_s 2**(e_s - E) S_{b,s}`` (:class:`counterbid.estimators.BidderGram`,
``docs/method.md``, "Strata, shards and the experiment to date"). A bidder bids in many shards,
so the shards' sums must meet on the bidder before they are squared. On Spark:

1. each shard's worker adds its pieces' bidder sums per bidder (in units of ``2**e`` with ``e``
   the shard's largest bid exponent: :func:`bidder_rows`, whose plain formula is
   :func:`counterbid.estimators.bidder_totals` on the ids' text) and returns them as rows
   (bidder key, unit, sums) beside its pieces, which travel without their bidder sums. The key
   is a 64-bit integer: an integer id itself, a text id's FNV-1a hash
   (:func:`counterbid.readers.id_hashes.fnv1a_64`), so the shuffle moves no text; one input
   has one type of bidder id (Spark reads it with one schema). Two text ids of one hash would
   be one bidder of the Gram form, with probability at most ``n (n - 1) / 2**65`` for ``n``
   distinct ids (the birthday bound; 2.7e-4 at 10**8 ids), as on the local engine's shards;
2. Spark repartitions those rows by bidder key, so every bidder's rows meet in one partition;
   each partition's worker adds them per bidder and returns one row: its bidders' count and
   ``sum_b U_b U_b'`` in units of ``2**(2 e_p)`` (:func:`partition_gram`);
3. the driver adds the partitions' forms, each rescaled by a power of two
   (:func:`combined_gram`; exact unless it under- or overflows).

A segmented experiment needs one form per segment beside the pooled one. The shard's rows are
then per (segment, bidder); a partition adds a bidder's rows of all segments into the pooled
``U_b`` and each segment's rows into that segment's, and returns one Gram row per form
(:func:`combined_grams` adds them per form on the driver).

Driver memory: the pieces without bidder sums, plus one ``(K + 1) x (K + 1)`` matrix per
partition and form -- independent of the number of bidders. Step 2's workers hold one partition's rows.

References
----------
.. [1] Cameron, A. C. & Miller, D. L. (2015). A practitioner's guide to cluster-robust inference.
   J. Human Resources 50(2), 317-372 (the cluster-robust sandwich as a sum of outer products).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Iterator, Mapping, Sequence

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from counterbid.estimators import BidderGram, StratumPiece

from .id_hashes import fnv1a_64

__all__ = ["BIDDER_COLUMNS", "GRAM_COLUMNS", "bidder_keys", "bidder_rows", "bidder_table", "combined_gram", "combined_grams",
           "ids_text", "partition_gram"]

#: Columns of a shard's per-bidder rows (null on its answer row); ``bidder_segment`` is null unless segmented.
#: ``bidder_sums`` holds a row's ``K + 1`` float64 sums as bytes (little-endian): Spark moves a binary
#: value as one copy, an array of doubles element by element.
BIDDER_COLUMNS = "bidder_key long, bidder_segment string, bidder_unit int, bidder_sums binary"
#: Columns of a partition's Gram rows (null on the answer rows passed through): ``part_segment``
#: null for the pooled form (every segment together), else the segment label of the form.
GRAM_COLUMNS = "part_segment string, part_bidders long, part_unit int, part_gram array<double>"


def ids_text(ids: np.ndarray) -> pa.Array:
    """Bidder ids as Arrow text, integers by their decimal text (as ``ids_as_text``, vectorised)."""
    ids = np.asarray(ids)
    if ids.dtype.kind in "iu":
        return pa.array(ids.astype(np.int64)).cast(pa.string())
    try:  # str objects (text ids): converted in C
        return pa.array(ids, pa.string())
    except (pa.ArrowInvalid, pa.ArrowTypeError):  # integers among them: by their decimal text
        return pa.array([str(int(v)) if isinstance(v, (int, np.integer)) else str(v) for v in ids.tolist()], pa.string())


def bidder_keys(ids: np.ndarray) -> np.ndarray:
    """The 64-bit key of each bidder id: an integer id itself, a text id the FNV-1a hash of its text.

    Parameters
    ----------
    ids : numpy.ndarray
        A piece's bidder ids: integers, or text (str objects).

    Returns
    -------
    numpy.ndarray of int64
    """
    ids = np.asarray(ids)
    if ids.dtype.kind in "iu":
        return ids.astype(np.int64)
    return fnv1a_64(ids_text(ids))


def bidder_rows(pieces: Sequence[StratumPiece]) -> tuple[np.ndarray, int, np.ndarray]:
    """One shard's per-bidder totals: bidder keys, their unit exponent and the ``(B, K + 1)`` sums.

    The sums of :func:`counterbid.estimators.bidder_totals` (its plain formula, where bidders meet
    on the text of their id), with bidders meeting on :func:`bidder_keys`.

    Parameters
    ----------
    pieces : sequence of StratumPiece
        A shard's pieces, every one with bidder sums.

    Returns
    -------
    (numpy.ndarray of int64, int, numpy.ndarray)
        Keys of the shard's bidders, and ``U_b`` in units of ``2**unit`` bids, ``unit`` the shard's
        largest bid exponent.

    References
    ----------
    .. [1] Cameron, A. C. & Miller, D. L. (2015). J. Human Resources 50(2), 317-372.
    """
    pieces = list(pieces)
    unit = max(p.bid_exponent for p in pieces)
    keys = [bidder_keys(p.bidder_ids) for p in pieces]
    codes, uniques = pd.factorize(np.concatenate(keys), sort=False)
    sums = np.zeros((pieces[0].bidder_sums.shape[1], len(uniques)))
    bounds = np.cumsum([0] + [k.size for k in keys])
    for p, lo, hi in zip(pieces, bounds[:-1], bounds[1:]):
        w = p.n_auctions * math.ldexp(1.0, p.bid_exponent - unit)
        for j in range(sums.shape[0]):
            sums[j] += np.bincount(codes[lo:hi], weights=w * p.bidder_sums[:, j], minlength=len(uniques))
    return uniques.astype(np.int64), int(unit), sums.T.copy()


def _bytes_column(matrix: np.ndarray) -> pa.Array:
    """Rows of a 2-D float array as an Arrow binary column, each row's values as little-endian float64 bytes."""
    rows, width = matrix.shape
    data = np.ascontiguousarray(matrix, dtype="<f8")
    offsets = np.arange(rows + 1, dtype=np.int32) * (width * 8)
    return pa.Array.from_buffers(pa.binary(), rows, [None, pa.py_buffer(offsets), pa.py_buffer(data)])


def _bytes_rows(column: pa.Array) -> np.ndarray:
    """The ``(rows, K + 1)`` float64 matrix of a binary column of :func:`_bytes_column` (no nulls; every row one width)."""
    wide = pa.types.is_large_binary(column.type)
    offsets = np.frombuffer(column.buffers()[1], dtype=np.int64 if wide else np.int32)
    offsets = offsets[column.offset:column.offset + len(column) + 1].astype(np.int64)
    lengths = np.diff(offsets)
    if len(column) == 0:
        return np.zeros((0, 0))
    if not (lengths == lengths[0]).all() or lengths[0] % 8:
        raise ValueError("bidder sums: the rows do not all hold the same number of float64 values")
    data = np.frombuffer(column.buffers()[2], dtype=np.uint8)[offsets[0]:offsets[-1]]
    return data.view("<f8").reshape(len(column), int(lengths[0]) // 8).astype(float)


def _list_column(matrix: np.ndarray) -> pa.Array:
    """Rows of a 2-D array as an Arrow list column."""
    rows, width = matrix.shape
    offsets = pa.array(np.arange(rows + 1, dtype=np.int32) * width, pa.int32())
    return pa.ListArray.from_arrays(offsets, pa.array(np.ascontiguousarray(matrix, dtype=float).ravel(), pa.float64()))


def bidder_table(keys: np.ndarray, unit: int, sums: np.ndarray, shard: int, answer_schema: pa.Schema,
                 segment: str | None = None) -> pa.Table:
    """The per-bidder rows of one shard (of one segment's pieces when ``segment``), in the answer's schema.

    Answer columns are null but ``shard``; ``bidder_segment`` is ``segment`` (null when not segmented).
    """
    n = len(keys)
    columns = {}
    for field in answer_schema:
        if field.name == "shard":
            columns["shard"] = pa.array(np.full(n, shard, dtype=np.int64))
        elif field.name == "bidder_key":
            columns["bidder_key"] = pa.array(np.asarray(keys, dtype=np.int64), pa.int64())
        elif field.name == "bidder_segment":
            columns["bidder_segment"] = pa.array([segment] * n, pa.string())
        elif field.name == "bidder_unit":
            columns["bidder_unit"] = pa.array(np.full(n, unit, dtype=np.int32))
        elif field.name == "bidder_sums":
            columns["bidder_sums"] = _bytes_column(sums)
        else:
            columns[field.name] = pa.nulls(n, field.type)
    return pa.table(columns, schema=answer_schema)


def partition_gram(batches: Iterable[pa.RecordBatch], out_schema: pa.Schema) -> Iterator[pa.RecordBatch]:
    """One partition of the shards' rows, by bidder: answer rows passed through, bidder rows into Gram rows.

    Every bidder's rows are in this partition (Spark partitioned them by ``bidder_key``). A row is
    one bidder's totals over one shard's pieces (of one segment, when the experiment is
    segmented). The pooled form adds every row of a bidder, whatever its segment (a bidder's
    ``U_b`` is the sum of its per-segment totals: the strata of the segments partition the
    strata); each segment's form adds only that segment's rows. Each form is added in its rows'
    largest unit ``2**e`` and squared: ``part_gram = sum_b U_b U_b'`` (row-major),
    ``part_bidders = B``, ``part_unit = e``, ``part_segment`` null for the pooled form.
    """
    ids, segments, units, sums = [], [], [], []
    for batch in batches:
        table = pa.Table.from_batches([batch])
        answer = table.column("bidder_key").is_null()
        if pc.any(answer).as_py():
            rows = table.filter(answer)
            yield from _in_schema(rows, out_schema).to_batches()
            table = table.filter(pc.invert(answer))
        if table.num_rows:
            ids.append(table.column("bidder_key").to_numpy())
            segments.append(table.column("bidder_segment").to_numpy(zero_copy_only=False))
            units.append(table.column("bidder_unit").to_numpy())
            sums.append(_bytes_rows(table.column("bidder_sums").combine_chunks()))
    if not ids:
        return
    id_of_row, segment_of_row = np.concatenate(ids), np.concatenate(segments)
    unit_of_row, sums_of_row = np.concatenate(units), np.concatenate(sums)
    forms = [(None, slice(None))]
    labels = pd.unique(segment_of_row[pd.notna(segment_of_row)])
    forms += [(str(label), segment_of_row == label) for label in sorted(labels)]
    for label, rows in forms:
        bidders, unit, gram = _gram_of_rows(id_of_row[rows], unit_of_row[rows], sums_of_row[rows])
        row = {field.name: pa.nulls(1, field.type) for field in out_schema}
        row["part_segment"] = pa.array([label], pa.string())
        row["part_bidders"] = pa.array([bidders], pa.int64())
        row["part_unit"] = pa.array([unit], pa.int32())
        row["part_gram"] = _list_column(gram.reshape(1, -1))
        yield from pa.table(row, schema=out_schema).to_batches()


def _gram_of_rows(ids: np.ndarray, units: np.ndarray, sums: np.ndarray) -> tuple[int, int, np.ndarray]:
    """Rows of (bidder key, unit exponent, sums) added per bidder in their largest unit, then ``sum_b U_b U_b'``."""
    top = int(units.max())
    scaled = sums * np.ldexp(1.0, units - top)[:, None]
    codes, uniques = pd.factorize(ids)
    totals = np.zeros((len(uniques), scaled.shape[1]))
    for j in range(scaled.shape[1]):
        totals[:, j] = np.bincount(codes, weights=scaled[:, j], minlength=len(uniques))
    return len(uniques), top, totals.T @ totals


def _in_schema(rows: pa.Table, schema: pa.Schema) -> pa.Table:
    """``rows`` with ``schema``'s columns: its own where it has them, nulls for the others."""
    return pa.table({f.name: rows.column(f.name) if f.name in rows.column_names else pa.nulls(rows.num_rows, f.type)
                     for f in schema}, schema=schema)


def combined_grams(parts: Iterable[tuple[str | None, int, int, Sequence[float]]], size: int,
                   units: Mapping[str | None, int]) -> dict[str | None, BidderGram]:
    """The partitions' Gram rows added per form: the pooled one (key ``None``) and each segment's.

    Parameters
    ----------
    parts : iterable of (str or None, int, int, sequence of float)
        Each partition's form: segment label (``None``: pooled), distinct bidders, unit exponent
        and row-major ``(size, size)`` matrix.
    size : int
        Revenue labels ``K + 1``.
    units : mapping of str or None to int
        Unit exponent of each form's result (at least its partitions'): the largest bid exponent
        of the pieces it describes.

    Returns
    -------
    dict of str or None to BidderGram

    References
    ----------
    .. [1] Cameron, A. C. & Miller, D. L. (2015). J. Human Resources 50(2), 317-372.
    """
    by_form: dict[str | None, list] = {}
    for label, bidders, part_unit, values in parts:
        by_form.setdefault(label, []).append((bidders, part_unit, values))
    unknown = sorted(set(by_form) - set(units), key=str)
    if unknown:
        raise ValueError(f"Gram rows of segment {unknown[0]!r}, which has no pieces")
    return {label: combined_gram(by_form.get(label, []), size, units[label]) for label in units}


def combined_gram(parts: Iterable[tuple[int, int, Sequence[float]]], size: int, unit: int) -> BidderGram:
    """The partitions' ``(bidders, unit, gram)`` added in units of ``2**unit`` bids.

    Parameters
    ----------
    parts : iterable of (int, int, sequence of float)
        Each partition's distinct bidders, unit exponent and row-major ``(size, size)`` form.
    size : int
        Revenue labels ``K + 1``.
    unit : int
        Unit exponent of the result (at least every partition's).

    Returns
    -------
    BidderGram

    References
    ----------
    .. [1] Cameron, A. C. & Miller, D. L. (2015). J. Human Resources 50(2), 317-372.
    """
    gram = np.zeros((size, size))
    n_bidders = 0
    for bidders, part_unit, values in parts:
        gram += math.ldexp(1.0, 2 * (int(part_unit) - unit)) * np.asarray(values, dtype=float).reshape(size, size)
        n_bidders += int(bidders)
    return BidderGram(gram=gram, n_bidders=n_bidders, bid_exponent=int(unit))
