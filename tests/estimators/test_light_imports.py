"""What the estimate path computes without ``scipy.stats``, against ``scipy.stats`` itself.

The allocation rules evaluate Bernstein polynomials through the binomial pmf, survival function
and log-pmf, and the intervals take a normal quantile; these come from ``scipy.special`` so that
``counterbid estimate`` does not import ``scipy.stats`` (about a second of a 1M-bid run). The
reference is ``scipy.stats.binom`` / ``scipy.stats.norm`` (the plain formula the shortcut replaces).
The tolerance: both sides are accurate to a few ulps of terms at most 1 (scipy.stats' to 3.4e-14
at the ends), so 1e-13 absolute on the terms, and 1e-12 relative on every weight and estimate built from them.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats as st
from scipy import special

import counterbid.estimators as estimators
from counterbid.estimators import allocation, allocation_rule, mixture_rule, revenue_weights, welfare_weights
from counterbid.estimators.allocation import _binom_logpmf, _binom_pmf, _binom_sf

QUANTILES = np.concatenate([[0.0, 1e-300, 1e-12, 0.5, 1.0 - 2.0**-53, 1.0], np.linspace(0.0, 1.0, 2**12 + 1)])


@pytest.mark.parametrize("m", [0, 1, 2, 4, 9, 30, 59])
def test_binomial_terms_are_scipy_stats_binom(m):
    q = QUANTILES[:, None]
    k = np.arange(m + 1)
    # scipy.stats' own terms are off by up to 3.4e-14 at the ends (its pmf of 0 successes in 2
    # trials at q = 1e-300 is 0.99999999999997, not 1): 1e-13 against it; the survival function
    # also 1e-14 against the plain sum of the pmf's upper tail
    np.testing.assert_allclose(_binom_pmf(k, m, q), st.binom.pmf(k, m, q), rtol=0, atol=1e-13)
    np.testing.assert_allclose(_binom_sf(k, m + 1, q), st.binom.sf(k, m + 1, q), rtol=0, atol=1e-13)
    tail = np.cumsum(st.binom.pmf(np.arange(m + 1, -1, -1), m + 1, q), axis=1)[:, ::-1][:, 1:]
    np.testing.assert_allclose(_binom_sf(k, m + 1, q), tail, rtol=0, atol=1e-14)
    with np.errstate(divide="ignore"):
        assert np.array_equal(_binom_logpmf(k, m, q), st.binom.logpmf(k, m, q))  # the same expression


def _stats_rule_value(rule, q):
    """``x(q)``, ``x'(q)`` and ``X(q)`` written with ``scipy.stats.binom`` (the formulas of the module notes)."""
    m = rule.n_bidders - 1
    j = np.arange(m + 1)
    value = st.binom.pmf(j, m, q[:, None]) @ rule.coefficients
    slope = m * (st.binom.pmf(j[:-1], m - 1, q[:, None]) @ rule.derivative_coefficients)
    integral = (st.binom.sf(j, m + 1, q[:, None]) @ rule.coefficients) / (m + 1)
    return value, slope, integral


@pytest.mark.parametrize("n", [2, 5, 12, 60])
def test_rules_and_weights_match_the_scipy_stats_evaluation(n):
    q = np.linspace(0.0, 1.0, 1025)
    arms = [allocation_rule(w, n) for w in ([0.5, 0.3, 0.1], [0.45, 0.35, 0.05, 0.02], [0.6])]
    for rule in arms:
        value, slope, integral = _stats_rule_value(rule, q)
        np.testing.assert_allclose(rule.value(q), value, rtol=1e-12, atol=1e-15)
        np.testing.assert_allclose(rule.derivative(q), slope, rtol=1e-12, atol=1e-15)
        np.testing.assert_allclose(rule.integral(q), integral, rtol=1e-12, atol=1e-15)
    # the log-space paths (ratios) against the direct ratio where it is well away from 0/0
    mixture = mixture_rule(arms, [0.6, 0.3, 0.1])
    inner = (q > 0.05) & (q < 0.95)
    value, slope, _ = _stats_rule_value(mixture, q[inner])
    np.testing.assert_allclose(np.exp(mixture.log_value(q[inner])), value, rtol=1e-12)
    np.testing.assert_allclose(np.exp(mixture.log_derivative(q[inner])), slope, rtol=1e-12)
    for rule in arms:
        _, y_slope, _ = _stats_rule_value(rule, q[inner])
        np.testing.assert_allclose(allocation.derivative_ratio(rule, mixture, q[inner]), y_slope / slope, rtol=1e-11)
        for weights in (revenue_weights(rule, mixture, 4096), welfare_weights(rule, mixture, 4096)):
            assert np.all(np.isfinite(weights.values[1:-1]))


@pytest.mark.parametrize("level", [0.5, 0.8, 0.9, 0.95, 0.99, 0.999])
def test_interval_quantile_is_the_normal_quantile(level):
    assert special.ndtri(0.5 + level / 2) == st.norm.ppf(0.5 + level / 2)


def test_every_public_name_resolves_and_is_listed():
    names = set(estimators.__all__)
    assert names == set(estimators._SOURCES)
    assert names <= set(dir(estimators))
    for name in sorted(names):
        assert getattr(estimators, name) is getattr(
            __import__(f"counterbid.estimators.{estimators._SOURCES[name]}", fromlist=[name]), name)
    with pytest.raises(AttributeError, match="no attribute 'not_a_name'"):
        estimators.not_a_name  # noqa: B018


@pytest.mark.parametrize("knots", [4, 5, 9, 1000, 2**14 + 1])
def test_spline_coefficients_are_scipy_cubic_spline(knots):
    from scipy.interpolate import CubicSpline

    from counterbid.estimators.order_weights import spline_coefficients

    rng = np.random.default_rng(knots)
    x = np.arange(knots) / (knots - 1)
    y = np.cumsum(rng.random((knots, 4)), axis=0) * rng.choice([-1.0, 1.0], 4)
    assert np.array_equal(spline_coefficients(x, y), CubicSpline(x, y, axis=0).c)  # the same numbers, bit for bit
    uneven = np.sort(rng.random(knots))
    assert np.array_equal(spline_coefficients(uneven, y[:, 0]), CubicSpline(uneven, y[:, 0]).c)
    y[knots // 2, 1] = np.nan  # not finite: scipy's own refusal
    with pytest.raises(ValueError, match="finite"):
        spline_coefficients(x, y)
