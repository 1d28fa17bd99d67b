"""The bidder Gram form from per-bidder rows keyed by 64-bit integers, one bucket of bidders at a time.

Bidder clustering needs ``sum_b U_b U_b'`` over the distinct bidders ``b``, with ``U_b`` the sum of
a bidder's weighted influence rows over every stratum and shard (:mod:`.window_totals`). A bidder's
rows are spread over the shards (shards split auctions, not bidders), so they must be added before
squaring; but they need not all be in memory at once. With the bidders split into buckets by a
function of their key, every bidder lies in exactly one bucket, so

``sum_b U_b U_b' = sum_buckets sum_{b in bucket} U_b U_b'``  and  ``B = sum_buckets B_bucket``:

each bucket's form is computed from that bucket's rows alone (:func:`keyed_gram`: a stable sort of
the keys and ``np.add.reduceat``), and memory is set by a bucket, not by the day. :func:`bucket_of`
spreads keys over buckets by Fibonacci hashing (Knuth 1998), so dense small integer ids spread as
well as hashed text.

References
----------
.. [1] Cameron, A. C. & Miller, D. L. (2015). A practitioner's guide to cluster-robust inference.
   J. Human Resources 50(2), 317-372 (the cluster-robust sandwich as a sum of outer products).
.. [2] Knuth, D. E. (1998). The Art of Computer Programming, Vol. 3, 2nd ed., sec. 6.4
   (multiplicative hashing by the golden ratio).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import InputError

__all__ = ["BUCKET_BITS", "KeyedGram", "bucket_of", "keyed_gram"]

#: Buckets of :func:`bucket_of` (``2**BUCKET_BITS``): the finest split of the bidders; a pass adds
#: up as many adjacent buckets as its row budget allows.
BUCKET_BITS = 10
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)  # 2**64 / golden ratio, odd


@dataclass(frozen=True)
class KeyedGram:
    """``sum_b U_b U_b'`` over the distinct keys of some rows, and how many keys there were.

    Attributes
    ----------
    gram : numpy.ndarray
        ``(K, K)``, symmetric.
    n_keys : int
        Distinct keys ``B``.
    """

    gram: np.ndarray
    n_keys: int

    def __add__(self, other: KeyedGram) -> KeyedGram:
        """The form of two sets of rows with no key in common (two buckets)."""
        return KeyedGram(self.gram + other.gram, self.n_keys + other.n_keys)


def bucket_of(keys: np.ndarray, bits: int = BUCKET_BITS) -> np.ndarray:
    """The bucket ``0 .. 2**bits - 1`` of each 64-bit key: the top ``bits`` bits of ``key * 0x9E37...15 mod 2**64``.

    Parameters
    ----------
    keys : numpy.ndarray of int64 or uint64
    bits : int
        Between 0 and 16.

    Returns
    -------
    numpy.ndarray of int64

    References
    ----------
    .. [1] Knuth, D. E. (1998). The Art of Computer Programming, Vol. 3, sec. 6.4.
    """
    if not 0 <= int(bits) <= 16:
        raise InputError(f"bucket bits must be between 0 and 16; got {bits!r}")
    keys = np.asarray(keys)
    if keys.dtype.kind not in "iu":
        raise InputError(f"bidder keys must be 64-bit integers; got {keys.dtype}")
    if int(bits) == 0:
        return np.zeros(keys.size, dtype=np.int64)
    mixed = keys.astype(np.uint64, copy=False) * _GOLDEN  # wraps modulo 2**64
    return (mixed >> np.uint64(64 - int(bits))).astype(np.int64)


def keyed_gram(keys: np.ndarray, rows: np.ndarray) -> KeyedGram:
    """``sum_b U_b U_b'`` with ``U_b`` the sum of the rows of key ``b``, over the distinct keys.

    Parameters
    ----------
    keys : numpy.ndarray of int, shape (n,)
    rows : numpy.ndarray of float, shape (n, K)
        Rows of one key are added in their order here (a stable sort), as a bincount would.

    Returns
    -------
    KeyedGram

    Notes
    -----
    The plain formula, kept as its test: factorize the keys, ``U = bincount`` per column, ``U' U``.

    References
    ----------
    .. [1] Cameron, A. C. & Miller, D. L. (2015). J. Human Resources 50(2), 317-372.
    """
    keys = np.asarray(keys)
    rows = np.asarray(rows, dtype=float)
    if rows.ndim != 2 or rows.shape[0] != keys.size:
        raise InputError(f"keyed gram: {keys.size} keys for rows of shape {rows.shape}")
    if not keys.size:
        return KeyedGram(np.zeros((rows.shape[1], rows.shape[1])), 0)
    order = np.argsort(keys, kind="stable")
    sorted_keys = keys[order]
    starts = np.flatnonzero(np.concatenate(([True], sorted_keys[1:] != sorted_keys[:-1])))
    del sorted_keys
    totals = np.add.reduceat(rows[order], starts, axis=0)
    return KeyedGram(totals.T @ totals, int(starts.size))
