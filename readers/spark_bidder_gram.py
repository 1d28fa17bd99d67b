"""Bidder clustering on Spark: per-bidder sums added on the executors, only their Gram form reaches the driver.

Bidder clustering needs ``sum_b U_b U_b'`` over the distinct bidders ``b`` of the input, with
``U_b = sum_s M_s 2**(e_s - E) S_{b,s}`` (:class:`counterbid.estimators.BidderGram`,
``docs/method.md``, "Strata, shards and the experiment to date"). A bidder bids in many shards,
so the shards' sums must meet on the bidder before they are squared. On Spark:

1. each shard's worker adds its pieces' bidder sums per bidder (in units of ``2**e`` with ``e``
   the shard's largest bid exponent: :func:`bidder_rows`, whose plain formula is
   :func:`counterbid.estimators.bidder_totals` on the ids' text) and returns them beside its
   pieces, which travel without their bidder sums, as a few rows of packed columns: one row per
   bidder bucket (the key modulo the number of buckets, :func:`bidder_buckets`) holding that
   bucket's keys and sums as two binary values (:func:`bidder_table`). Spark then moves a handful of
   large values per shard, not one row per bidder (most bidders of a text-id day bid once). The key
   is a 64-bit integer: an integer id itself, a text id's FNV-1a hash
   (:func:`counterbid.readers.id_hashes.fnv1a_64`), so the shuffle moves no text; one input
   has one type of bidder id (Spark reads it with one schema). Two text ids of one hash would
   be one bidder of the Gram form, with probability at most ``n (n - 1) / 2**65`` for ``n``
   distinct ids (the birthday bound; 2.7e-4 at 10**8 ids), as on the local engine's shards;
2. Spark repartitions those rows by bucket, so every bidder's rows meet in one partition;
   each partition's worker unpacks them, adds them per bidder (shards in ascending order, so the
   result does not depend on the order in which the shuffle delivers them) and returns one row:
   its bidders' count and ``sum_b U_b U_b'`` in units of ``2**(2 e_p)`` (:func:`partition_gram`);
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

__all__ = ["BIDDER_COLUMNS", "GRAM_COLUMNS", "bidder_buckets", "bidder_keys", "bidder_rows", "bidder_table",
           "combined_gram", "combined_grams", "ids_text", "partition_gram"]

#: Columns of a shard's packed bidder rows (null on its answer row), one row per (segment, bucket):
#: ``bidder_bucket`` the bucket, ``bidder_segment`` null unless segmented, ``bidder_unit`` the unit
#: exponent of the sums, ``bidder_keys`` the bucket's ``B`` int64 keys and ``bidder_sums`` their
#: ``B x (K + 1)`` float64 sums (row-major), both as little-endian bytes: Spark moves a binary value
#: as one copy, where one row per bidder costs it a row's work per bidder.
BIDDER_COLUMNS = "bidder_bucket int, bidder_segment string, bidder_unit int, bidder_keys binary, bidder_sums binary"
#: Columns of a partition's Gram rows (null on the answer rows passed through): ``part_segment``
#: null for the pooled form (every segment together), else the segment label of the form.
GRAM_COLUMNS = "part_segment string, part_bidders long, part_unit int, part_gram array<double>"


def ids_text(ids: np.ndarray) -> pa.Array:
    """Bidder ids as Arrow text, integers by their decimal text (as ``ids_as_text``, vectorised).

    Parameters
    ----------
    ids : numpy.ndarray
        Integer ids, or objects (text, or text and integers mixed).

    Returns
    -------
    pyarrow.Array of string
        One per id, in order.
    """
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


def bidder_buckets(keys: np.ndarray, buckets: int) -> np.ndarray:
    """The bucket ``0 .. buckets - 1`` of each 64-bit bidder key: the key as an unsigned integer, modulo ``buckets``.

    Every shard puts a bidder in the same bucket, so a bucket's rows of all shards hold every row
    of its bidders.

    Parameters
    ----------
    keys : numpy.ndarray of int64
        Bidder keys (:func:`bidder_keys`).
    buckets : int
        How many buckets (at least 1).

    Returns
    -------
    numpy.ndarray of int32
        The bucket of each key.
    """
    if int(buckets) < 1:
        raise ValueError(f"bidder buckets: need at least one, got {buckets}")
    return (np.asarray(keys, dtype=np.int64).view(np.uint64) % np.uint64(int(buckets))).astype(np.int32)


def _packed(values: np.ndarray, dtype: str) -> bytes:
    """``values`` as little-endian bytes of ``dtype`` (row-major)."""
    return np.ascontiguousarray(values, dtype=dtype).tobytes()


def _unpacked(value: pa.Scalar, dtype: str) -> np.ndarray:
    """The values of one binary value of :func:`_packed` (no copy), flat; empty when null."""
    if not value.is_valid:
        return np.zeros(0, dtype=dtype)
    buffer = value.as_buffer()
    if buffer.size % np.dtype(dtype).itemsize:
        raise ValueError(f"bidder rows: a packed value of {buffer.size} bytes is not a whole number of {dtype} values")
    return np.frombuffer(buffer, dtype=dtype)


def _list_column(matrix: np.ndarray) -> pa.Array:
    """Rows of a 2-D array as an Arrow list column."""
    rows, width = matrix.shape
    offsets = pa.array(np.arange(rows + 1, dtype=np.int32) * width, pa.int32())
    return pa.ListArray.from_arrays(offsets, pa.array(np.ascontiguousarray(matrix, dtype=float).ravel(), pa.float64()))


def bidder_table(keys: np.ndarray, unit: int, sums: np.ndarray, shard: int, answer_schema: pa.Schema,
                 segment: str | None = None, buckets: int = 1) -> pa.Table:
    """One shard's bidder rows (of one segment's pieces when ``segment``), packed per bucket, in the answer's schema.

    Parameters
    ----------
    keys : numpy.ndarray of int64
        The shard's ``B`` bidder keys (:func:`bidder_rows`).
    unit : int
        Unit exponent of ``sums``.
    sums : numpy.ndarray
        ``(B, K + 1)`` sums, row ``i`` bidder ``keys[i]``'s.
    shard : int
    answer_schema : pyarrow.Schema
        Columns of the answer (:data:`BIDDER_COLUMNS` among them).
    segment : str, optional
        The segment of the rows (null when not segmented).
    buckets : int
        Number of buckets (:func:`bidder_buckets`); the Gram step's partitions.

    Returns
    -------
    pyarrow.Table
        One row per bucket holding some of the keys: answer columns null but ``shard``;
        ``bidder_keys`` and ``bidder_sums`` the bucket's keys and sums, in the order of ``keys``.
    """
    keys = np.asarray(keys, dtype=np.int64)
    sums = np.asarray(sums, dtype=float)
    if sums.ndim != 2 or sums.shape[0] != keys.size:
        raise ValueError(f"bidder rows: sums of shape {sums.shape} for {keys.size} keys")
    bucket = bidder_buckets(keys, buckets)
    order = np.argsort(bucket, kind="stable")  # each bucket's rows keep their order
    bounds = np.searchsorted(bucket[order], np.arange(int(buckets) + 1))
    held = [b for b in range(int(buckets)) if bounds[b + 1] > bounds[b]]
    n = len(held)
    columns = {}
    for field in answer_schema:
        if field.name == "shard":
            columns["shard"] = pa.array(np.full(n, shard, dtype=np.int64))
        elif field.name == "bidder_bucket":
            columns["bidder_bucket"] = pa.array(np.asarray(held, dtype=np.int32), pa.int32())
        elif field.name == "bidder_segment":
            columns["bidder_segment"] = pa.array([segment] * n, pa.string())
        elif field.name == "bidder_unit":
            columns["bidder_unit"] = pa.array(np.full(n, unit, dtype=np.int32))
        elif field.name == "bidder_keys":
            columns["bidder_keys"] = pa.array([_packed(keys[order[bounds[b]:bounds[b + 1]]], "<i8") for b in held],
                                              pa.binary())
        elif field.name == "bidder_sums":
            columns["bidder_sums"] = pa.array([_packed(sums[order[bounds[b]:bounds[b + 1]]], "<f8") for b in held],
                                              pa.binary())
        else:
            columns[field.name] = pa.nulls(n, field.type)
    return pa.table(columns, schema=answer_schema)


def partition_gram(batches: Iterable[pa.RecordBatch], out_schema: pa.Schema) -> Iterator[pa.RecordBatch]:
    """One partition of the shards' rows, by bucket: answer rows passed through, bidder rows into Gram rows.

    Every bidder's rows are in this partition (Spark partitioned them by ``bidder_bucket``). A
    packed row holds one shard's totals of its bidders of one bucket (of one segment, when the
    experiment is segmented). The pooled form adds every total of a bidder, whatever its segment
    (a bidder's ``U_b`` is the sum of its per-segment totals: the strata of the segments partition
    the strata); each segment's form adds only that segment's totals. Rows are unpacked in order of
    shard, segment and bucket, whatever order they arrived in, so a bidder's totals are added in one
    order. Each form is added in its rows' largest unit ``2**e`` and squared: ``part_gram = sum_b
    U_b U_b'`` (row-major), ``part_bidders = B``, ``part_unit = e``, ``part_segment`` null for the
    pooled form.

    Parameters
    ----------
    batches : iterable of pyarrow.RecordBatch
        The partition's rows (Spark's ``mapInArrow`` input): answer rows and packed bidder rows
        (:data:`BIDDER_COLUMNS`).
    out_schema : pyarrow.Schema
        The output rows' schema: the answer columns and :data:`GRAM_COLUMNS`.

    Returns
    -------
    iterator of pyarrow.RecordBatch
        The answer rows as they came, then one Gram row per form (pooled, and each segment's).
    """
    packed = []
    for batch in batches:
        table = pa.Table.from_batches([batch])
        answer = table.column("bidder_keys").is_null()
        if pc.any(answer).as_py():
            rows = table.filter(answer)
            yield from _in_schema(rows, out_schema).to_batches()
            table = table.filter(pc.invert(answer))
        for i in range(table.num_rows):
            segment = table.column("bidder_segment")[i].as_py()
            packed.append(((int(table.column("shard")[i].as_py()), segment is not None, segment or "",
                            int(table.column("bidder_bucket")[i].as_py())),
                           segment, int(table.column("bidder_unit")[i].as_py()),
                           _unpacked(table.column("bidder_keys")[i], "<i8"),
                           _unpacked(table.column("bidder_sums")[i], "<f8")))
    packed = [row for row in packed if row[3].size]
    if not packed:
        return
    packed.sort(key=lambda row: row[0])
    width = packed[0][4].size // packed[0][3].size
    if any(row[4].size != row[3].size * width for row in packed):
        raise ValueError("bidder rows: the packed sums do not all hold the same number of values per bidder")
    id_of_row = np.concatenate([row[3] for row in packed])
    segment_of_row = np.repeat(np.array([row[1] for row in packed], dtype=object), [row[3].size for row in packed])
    unit_of_row = np.repeat(np.array([row[2] for row in packed], dtype=np.int64), [row[3].size for row in packed])
    sums_of_row = np.concatenate([row[4].reshape(-1, width) for row in packed])
    del packed
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
