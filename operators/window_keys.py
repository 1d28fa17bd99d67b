"""The running window's integer key of a bidder id, and today's buckets as ranges of it.

The stored totals (``bidder_window_totals``) carry an integer key per (segment, bidder): 63 bits of
the md5 of the id text (``sql/bidder_window_keys.sql``, the expression the insert, the lookup and
the delete use). The daily update looks today's bidders up bucket by bucket
(:mod:`.window_buckets`); when a bucket is a range of that key (its top bits), a lookup's join
hands DuckDB the range of the bucket's keys, and the row groups of the stored window written in
bucket order whose keys lie outside it are skipped (their min/max per row group), instead of
scanning the whole stored window once per bucket.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

from counterbid.estimators.errors import InputError
from counterbid.sql import statement

__all__ = ["KEY_BITS", "key_buckets", "window_keys"]

#: Bits of the integer key (non-negative int64).
KEY_BITS = 63


def window_keys(ids: pa.Array | pa.ChunkedArray) -> np.ndarray:
    """The integer key of each id text, in order (``sql/bidder_window_keys.sql`` on in-memory DuckDB).

    Parameters
    ----------
    ids : pyarrow.Array or ChunkedArray of text
        Bidder ids (no nulls).

    Returns
    -------
    numpy.ndarray of int64
        Each in ``0 .. 2**63 - 1``.

    References
    ----------
    .. [1] Rivest, R. (1992). The MD5 Message-Digest Algorithm. RFC 1321.
    """
    import duckdb

    if ids.null_count:
        raise InputError("bidder window: a bidder id is null; it has no key")
    if len(ids) == 0:
        return np.zeros(0, dtype=np.int64)
    with duckdb.connect(config={"threads": 1}) as con:
        con.register("ids", pa.table({"bidder_id": ids.cast(pa.string())}))
        keys = con.sql(statement("bidder_window_keys")).to_arrow_table().column("bidder_key")
    return keys.to_numpy().astype(np.int64, copy=False)


def key_buckets(keys: np.ndarray, bits: int) -> np.ndarray:
    """The bucket ``0 .. 2**bits - 1`` of each key: its top ``bits`` bits (bucket ``b`` is a range of keys).

    Parameters
    ----------
    keys : numpy.ndarray of int64
        Keys of :func:`window_keys`.
    bits : int
        Between 0 and :data:`KEY_BITS`.

    Returns
    -------
    numpy.ndarray of int64
    """
    if isinstance(bits, bool) or not isinstance(bits, (int, np.integer)) or not 0 <= int(bits) <= KEY_BITS:
        raise InputError(f"bidder window: bucket bits must be a whole number in 0..{KEY_BITS}, got {bits!r}")
    keys = np.asarray(keys, dtype=np.int64)
    return keys >> (KEY_BITS - int(bits)) if bits else np.zeros(keys.shape, dtype=np.int64)
