"""Allocation rules: closed forms, stability at n = 60, and properties (hypothesis)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.polynomial import Polynomial
from scipy import integrate
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
    # one slot vs the 50/50 mixture of one and two slots, n = 3: x' = 1, y' = 2q exactly.
    one, two = allocation_rule([1.0], 3), allocation_rule([1.0, 1.0], 3)
    mix = mixture_rule([one, two], [0.5, 0.5])
    q = np.array([0.0, 0.25, 1.0])
    np.testing.assert_allclose(derivative_ratio(one, mix, q), 2 * q, atol=1e-12)
    np.testing.assert_allclose(derivative_ratio(two, mix, q), 2 - 2 * q, atol=1e-12)


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
