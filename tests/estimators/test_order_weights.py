"""Cumulative weights: spline interpolation vs exact evaluation, and the sanity identity."""

from __future__ import annotations

import numpy as np
import pytest

from counterbid.estimators import allocation_rule, mixture_rule, revenue_weights, welfare_weights
from counterbid.estimators.order_weights import GRID_INTERVALS


@pytest.mark.parametrize("n", [2, 5, 20, 60])
def test_spline_matches_exact(n):
    arms = [allocation_rule([0.31, 0.17, 0.06, 0.02], n), allocation_rule([0.4], n), allocation_rule([0.29, 0.22, 0.15], n)]
    mix = mixture_rule(arms, [0.8, 0.1, 0.1])
    rng = np.random.default_rng(n)
    q = np.sort(rng.random(2000))
    for target in arms:
        for make in (revenue_weights, welfare_weights):
            big = make(target, mix)           # spline over the 2^14 grid
            exact = make(target, mix, 2000)   # exact on i/2000, not the spline's grid
            # evaluate the spline at the exact grid's points and compare
            np.testing.assert_allclose(big.at(exact.grid), exact.values, atol=1e-10, rtol=0)
            assert np.all(np.isfinite(big.at(q)))


def test_sanity_identity_weights_reduce_to_mixture():
    # With y = x_C, omega = x_C: Omega(q) = X_C(q) (docs/method.md, "Check: the mixture as its own target").
    n = 6
    mix = mixture_rule([allocation_rule([0.3, 0.1], n), allocation_rule([0.4], n)], [0.7, 0.3])
    w = revenue_weights(mix, mix, GRID_INTERVALS)
    np.testing.assert_allclose(w.values, mix.integral(w.grid), atol=1e-12)
