"""Allocation rules: closed forms, stability at n = 60, and properties (hypothesis)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.polynomial import Polynomial
from scipy import integrate
from scipy import stats as sps
from scipy.special import comb

from counterbid.estimators import InputError, allocation_rule, derivative_ratio, mixture_rule


def power_form(weights, n):
    """x(q) = sum_k w_k C(n-1, k-1) (1-q)^(k-1) q^(n-k), built as an explicit numpy Polynomial."""
    q = Polynomial([0, 1])
    total = Polynomial([0.0])
    for k, w in enumerate(weights[:n], start=1):
        total = total + w * comb(n - 1, k - 1) * (1 - q) ** (k - 1) * q ** (n - k)
    return total


@pytest.mark.parametrize("n", [1, 2, 3, 5, 10])
@pytest.mark.parametrize("weights", [[1.0], [1.0, 1.0], [0.31, 0.17, 0.06, 0.02], [0.5, 0.5, 0.2, 0.2, 0.1]])
def test_matches_power_form(weights, n):
    # Definition of the allocation rule (docs/method.md, "Model"), expanded independently.
    q = np.linspace(0, 1, 101)
    rule = allocation_rule(weights, n)
    poly = power_form(weights, n)
    np.testing.assert_allclose(rule.value(q), poly(q), atol=1e-12)
    np.testing.assert_allclose(rule.derivative(q), poly.deriv()(q), atol=1e-10)
    np.testing.assert_allclose(rule.integral(q), poly.integ()(q) - poly.integ()(0), atol=1e-12)


def test_one_slot_is_power_of_q():
    # One slot, n bidders: win iff all n-1 others are below, x(q) = q^(n-1) (Krishna 2010, ch. 2).
    q = np.linspace(0, 1, 11)
    np.testing.assert_allclose(allocation_rule([1.0], 4).value(q), q**3, atol=1e-15)


def test_integral_against_quad():
    # scipy.integrate.quad as an independent reference for X(q) = int_0^q x.
    rule = allocation_rule([0.4, 0.3, 0.1], 7)
    for qq in (0.1, 0.5, 0.93):
        ref, _ = integrate.quad(lambda r: float(rule.value(r)), 0, qq, epsabs=1e-13)
        assert float(rule.integral(qq)) == pytest.approx(ref, abs=1e-12)


def test_stable_at_sixty_bidders():
    rule = allocation_rule([0.3, 0.2, 0.1], 60)
    q = np.array([1e-9, 1e-3, 0.5, 0.95, 0.999, 1.0])
    x = rule.value(q)
    assert np.all(np.isfinite(x)) and np.all(x >= 0) and np.all(np.diff(x) >= 0)
    assert x[-1] == pytest.approx(0.3)
    # log_value agrees with log(value) where value does not underflow, and stays finite where it does.
    np.testing.assert_allclose(rule.log_value(q[2:]), np.log(x[2:]), rtol=1e-12)
    assert np.isfinite(rule.log_value(np.array([1e-12]))).all()
    # Derivative ratio stays bounded by 1/share and finite where both derivatives underflow.
    mix = mixture_rule([rule, allocation_rule([0.3, 0.25, 0.2], 60)], [0.9, 0.1])
    r = derivative_ratio(rule, mix, np.array([0.0, 1e-12, 1e-4, 0.5, 1.0]))
    assert np.all(np.isfinite(r)) and np.all(r <= 1 / 0.9 + 1e-12)


def test_derivative_ratio_limits():
    """Four bidders, one slot against two identical slots at 80/20.

    With ``m = n - 1`` rivals, ``k`` identical slots are won when at least ``m - k + 1`` rivals
    bid lower: ``x_k(q) = P[Bin(m, q) >= m - k + 1]``, whose derivative is the binomial density
    ``x_k'(q) = m C(m-1, m-k) q^(m-k) (1-q)^(k-1)`` (the identity d/dq P[Bin(m, q) >= j] =
    m C(m-1, j-1) q^(j-1) (1-q)^(m-j); Johnson, Kemp & Kotz, Univariate Discrete Distributions,
    3rd ed., 2005, sec. 3.2, recalled from memory and checked here by scipy's binomial tail).
    For m = 3: x_1' = 3 q^2, x_2' = 6 q (1 - q), so the mixture's y' = 1.2 q (1 + q) and

        x_1'/y' = 5 q / (2 (1 + q))   (0 at q = 0, 5/4 = 1/0.8 at q = 1),
        x_2'/y' = 5 (1 - q) / (1 + q)  (5 = 1/0.2 at q = 0, 0 at q = 1),

    both 0/0 at one end, where the one-sided limits are the bounds 1/share or 0.
    """
    n = 4
    one, two = allocation_rule([1.0], n), allocation_rule([1.0, 1.0], n)
    mix = mixture_rule([one, two], [0.8, 0.2])
    q = np.array([0.0, 1 / 3, 0.5, 1.0])
    # The derivatives themselves, against scipy's binomial tail differentiated numerically.
    inner = np.array([0.2, 0.5, 0.7])
    h = 1e-6
    for rule, k in ((one, 1), (two, 2)):
        tail = lambda t: sps.binom.sf(n - 1 - k, n - 1, t)  # noqa: E731  P[Bin(3, t) >= 3 - k + 1]
        np.testing.assert_allclose(rule.value(inner), tail(inner), atol=1e-12)
        np.testing.assert_allclose((tail(inner + h) - tail(inner - h)) / (2 * h),
                                   [3 * inner**2, 6 * inner * (1 - inner)][k - 1], atol=1e-6)
    np.testing.assert_allclose(derivative_ratio(one, mix, q), 5 * q / (2 * (1 + q)), atol=1e-12)
    np.testing.assert_allclose(derivative_ratio(two, mix, q), 5 * (1 - q) / (1 + q), atol=1e-12)
    np.testing.assert_allclose(derivative_ratio(one, mix, [0.0, 1.0]), [0.0, 1 / 0.8], atol=1e-12)
    np.testing.assert_allclose(derivative_ratio(two, mix, [0.0, 1.0]), [1 / 0.2, 0.0], atol=1e-12)


def test_rejects_bad_weights():
    with pytest.raises(InputError, match="non-increasing; position 2"):
        allocation_rule([0.1, 0.2], 3)
    with pytest.raises(InputError, match=">= 1"):
        allocation_rule([1.0], 0)
    with pytest.raises(InputError, match="sum to 1"):
        mixture_rule([allocation_rule([1.0], 2)] * 2, [0.5, 0.6])


weights_strategy = st.lists(st.floats(0, 1, allow_nan=False), min_size=1, max_size=8).map(
    lambda w: sorted(w, reverse=True)
).filter(lambda w: w[0] > 0)


@settings(max_examples=60, deadline=None)
@given(weights=weights_strategy, n=st.integers(1, 60))
def test_monotone_and_bounded(weights, n):
    q = np.linspace(0, 1, 257)
    x = allocation_rule(weights, n).value(q)
    assert np.all(np.diff(x) >= -1e-12)
    assert np.all(x >= -1e-15) and np.all(x <= weights[0] + 1e-12)


@settings(max_examples=60, deadline=None)
@given(a=weights_strategy, b=weights_strategy, s=st.floats(0.01, 0.99), n=st.integers(2, 30))
def test_mixture_is_linear(a, b, s, n):
    q = np.linspace(0, 1, 65)
    ra, rb = allocation_rule(a, n), allocation_rule(b, n)
    mix = mixture_rule([ra, rb], [s, 1 - s])
    for f in ("value", "derivative", "integral"):
        np.testing.assert_allclose(
            getattr(mix, f)(q), s * getattr(ra, f)(q) + (1 - s) * getattr(rb, f)(q), atol=1e-10
        )
