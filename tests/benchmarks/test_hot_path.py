"""The estimator's hot-path shortcuts give exactly what the direct numpy/pandas calls give."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from counterbid.estimators.bids import _auction_codes, sort_order


@pytest.mark.parametrize("n", [10, 2**16 + 5, 300_000])
def test_sort_order_is_the_stable_argsort(n):
    rng = np.random.default_rng(n)
    bids = rng.lognormal(0.0, 0.5, n)
    bids[rng.integers(0, n, n // 10)] = np.round(bids[: n // 10], 2)  # many exact ties
    bids[rng.integers(0, n, 7)] = 0.0
    bids[rng.integers(0, n, 3)] = -0.0  # passes the bid >= 0 check; its sign bit must not matter
    bids[rng.integers(0, n, 5)] = np.nextafter(bids[0], np.inf)  # neighbours one ulp apart
    np.testing.assert_array_equal(sort_order(bids), np.argsort(bids, kind="stable"))


@pytest.mark.parametrize("ids", [
    np.repeat(np.arange(5, 50_005, 3), 4),                       # written auction by auction
    np.random.default_rng(1).permutation(np.repeat(np.arange(9_000), 3)),  # shuffled
    np.array([7]),
])
def test_auction_codes_match_factorize(ids):
    series = pd.Series(ids)
    np.testing.assert_array_equal(_auction_codes(series), pd.factorize(series, sort=False)[0])
    strings = series.astype(str)
    np.testing.assert_array_equal(_auction_codes(strings), pd.factorize(strings, sort=False)[0])
