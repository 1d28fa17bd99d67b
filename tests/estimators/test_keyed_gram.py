"""The bucketed bidder form (`estimators/keyed_gram.py`) against the plain formula.

The plain formula factorizes the keys, adds each key's rows with a bincount per column and forms
``U' U``; the shortcut sorts the keys and adds runs with ``reduceat``, and a split of the keys into
buckets adds the buckets' forms. Both add each key's rows in the same order, so the per-key totals
are the same doubles; the forms differ only by the order of the outer products' sums (a few
thousand terms: ~1e-15 relative), hence 1e-12.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from counterbid.estimators.errors import InputError
from counterbid.estimators.keyed_gram import KeyedGram, bucket_of, keyed_gram


def _plain(keys, rows):
    codes, uniques = pd.factorize(keys)
    totals = np.column_stack([np.bincount(codes, weights=rows[:, j], minlength=len(uniques))
                              for j in range(rows.shape[1])])
    return totals.T @ totals, len(uniques)


def _rows(rng, n=5000, pool=900, k=4):
    """Keys that repeat (a pool smaller than the rows), hashed 64-bit values, rows of mixed sign."""
    pool_keys = rng.integers(-2**63, 2**63 - 1, size=pool, dtype=np.int64)
    keys = pool_keys[rng.integers(0, pool, size=n)]
    return keys, rng.normal(size=(n, k)) * rng.lognormal(size=(n, 1))


def test_keyed_gram_equals_the_factorized_totals():
    keys, rows = _rows(np.random.default_rng(3))
    got = keyed_gram(keys, rows)
    want, n = _plain(keys, rows)
    assert got.n_keys == n < keys.size
    np.testing.assert_allclose(got.gram, want, rtol=1e-12, atol=0)
    assert np.array_equal(got.gram, got.gram.T)


@pytest.mark.parametrize("bits", [0, 1, 4, 10])
def test_buckets_add_up_to_the_whole(bits):
    keys, rows = _rows(np.random.default_rng(bits + 10))
    bucket = bucket_of(keys, bits)
    assert bucket.min() >= 0 and bucket.max() < 2 ** bits
    parts = KeyedGram(np.zeros((4, 4)), 0)
    for b in np.unique(bucket):
        parts += keyed_gram(keys[bucket == b], rows[bucket == b])
    want, n = _plain(keys, rows)
    assert parts.n_keys == n
    np.testing.assert_allclose(parts.gram, want, rtol=1e-12, atol=0)


def test_dense_small_ids_spread_over_the_buckets():
    """Integer ids 0..n-1 (a day's codes) must not all land in bucket 0, as their top bits would."""
    counts = np.bincount(bucket_of(np.arange(64 * 1024, dtype=np.int64), 6), minlength=64)
    assert counts.min() > 0.9 * 1024 and counts.max() < 1.1 * 1024


def test_bad_inputs_name_the_problem():
    with pytest.raises(InputError, match="64-bit integers"):
        bucket_of(np.array(["a", "b"]), 4)
    with pytest.raises(InputError, match="between 0 and 16"):
        bucket_of(np.arange(3), 17)
    with pytest.raises(InputError, match="3 keys for rows of shape"):
        keyed_gram(np.arange(3), np.zeros((4, 2)))
    empty = keyed_gram(np.zeros(0, dtype=np.int64), np.zeros((0, 3)))
    assert empty.n_keys == 0 and not empty.gram.any()
