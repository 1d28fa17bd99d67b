"""Anytime-valid bounds (estimators/sequential.py) against outside references.

* The tuning ``x* = -W_{-1}(-alpha^2/e) - 1`` is the minimiser of the half width at the planned
  look: checked against ``scipy.optimize.minimize_scalar`` on the formula itself.
* The boundary is the level set ``1/alpha`` of Robbins' (1970) normal mixture martingale
  ``int exp(l s - l^2 t / 2) N(l; 0, rho^2) dl`` of a Brownian motion at ``(t, s)``: checked with
  ``scipy.integrate.quad``, and against its closed form (Howard et al. 2021, normal mixture).
* Time-uniform coverage on a Gaussian random walk (independent increments, the to-date estimate's
  limit under auction clustering), 60 looks: the rate at which some look's bounds exclude the truth
  is at most alpha; the fixed interval's is far above it. R = 20,000 walks: the binomial sd of a rate
  near 0.05 is sqrt(0.05 x 0.95 / R) = 0.0015; checks allow 3 sd (0.0046).
* Looks more correlated than independent increments (a persistent day-level component, as bidders
  whose values persist across days give): by Slepian's inequality each side's crossing rate can
  only fall; measured on the same R walks.
"""

from __future__ import annotations

import datetime as dt
import math

import numpy as np
import pytest
import scipy.integrate as integrate
import scipy.optimize as optimize
import scipy.stats as st

from counterbid.estimators import InputError, parse_experiments
from counterbid.estimators.sequential import (
    DEFAULT_PLANNED_DAYS, anytime_bounds, anytime_multiplier, mixture_tuning, planned_days,
)

R = 20_000
MC_SD = math.sqrt(0.05 * 0.95 / R)


def _half_width_in_se(x: float, alpha: float) -> float:
    return math.sqrt((1 + 1 / x) * (math.log1p(x) + 2 * math.log(1 / alpha)))


@pytest.mark.parametrize("level", [0.8, 0.9, 0.95, 0.99])
def test_tuning_minimises_the_half_width_at_the_planned_look(level):
    alpha = 1 - level
    best = optimize.minimize_scalar(lambda x: _half_width_in_se(x, alpha), bounds=(1e-3, 1e3), method="bounded",
                                    options={"xatol": 1e-10})
    assert mixture_tuning(level) == pytest.approx(best.x, rel=1e-5)
    # at the optimum the half width is sqrt(1 + x*) standard errors
    assert float(anytime_multiplier(1.0, confidence_level=level)) == pytest.approx(math.sqrt(1 + mixture_tuning(level)),
                                                                                   rel=1e-12)
    ratios = np.logspace(-3, 3, 61)
    m = anytime_multiplier(ratios, confidence_level=level)
    assert m.min() == pytest.approx(float(anytime_multiplier(1.0, confidence_level=level)), rel=1e-3)
    assert (m > st.norm.ppf(0.5 + level / 2)).all()  # always wider than the fixed interval


@pytest.mark.parametrize("t", [0.05, 0.5, 1.0, 3.0, 40.0])
def test_boundary_is_the_normal_mixture_level_set(t):
    # standard Brownian motion at time t (planned time 1): the mixture over l ~ N(0, rho^2) of
    # exp(l s - l^2 t / 2) equals 1/alpha exactly on the boundary s = sqrt(t) x multiplier
    alpha, level = 0.05, 0.95
    rho2 = mixture_tuning(level)  # rho^2 t* with t* = 1
    s = math.sqrt(t) * float(anytime_multiplier(t, confidence_level=level))
    integrand = lambda lam: math.exp(lam * s - lam * lam * t / 2) * st.norm.pdf(lam, scale=math.sqrt(rho2))  # noqa: E731
    mixture, _ = integrate.quad(integrand, -np.inf, np.inf, epsabs=0, epsrel=1e-11)
    assert mixture == pytest.approx(1 / alpha, rel=1e-7)
    # closed form of the two-sided normal mixture (Howard et al. 2021): (1 + rho^2 t)^(-1/2) exp(rho^2 s^2 / (2 (1 + rho^2 t)))
    closed = math.exp(rho2 * s * s / (2 * (1 + rho2 * t))) / math.sqrt(1 + rho2 * t)
    assert closed == pytest.approx(1 / alpha, rel=1e-12)


def _walks(rng, looks=60, persistent=0.0):
    """Standardised to-date means of R walks: unit-variance daily increments plus a shared component."""
    days = rng.standard_normal((R, looks))
    if persistent:
        days = days + math.sqrt(persistent) * rng.standard_normal((R, 1))  # a component every day shares
    sums = np.cumsum(days, axis=1)
    d = np.arange(1, looks + 1)
    var = d + persistent * d * d  # variance of the sum of d days
    return sums / np.sqrt(var), d


def test_time_uniform_coverage_of_a_gaussian_random_walk():
    rng = np.random.default_rng(2024)
    z, d = _walks(rng)
    m = anytime_multiplier(d / 28, confidence_level=0.95)
    crossed = (np.abs(z) > m).any(axis=1).mean()
    fixed = (np.abs(z) > st.norm.ppf(0.975)).any(axis=1).mean()
    single = (np.abs(z[:, 27]) > st.norm.ppf(0.975)).mean()
    assert crossed <= 0.05 + 3 * MC_SD, crossed  # measured 0.018: daily looks cross less than the continuum
    assert abs(single - 0.05) <= 3 * MC_SD, single  # one planned look: the fixed interval is exact
    assert fixed > 0.25, fixed  # measured 0.34 (0.20 over 10 looks): optional stopping


def test_more_correlated_looks_cross_less_often():
    # Exchangeable day correlation c = persistent / (1 + persistent) makes corr(Z_s, Z_t) >= sqrt(s/t) (the
    # random walk's), so Slepian's inequality bounds each side's crossing rate by the walk's.
    rng = np.random.default_rng(11)
    z0, d = _walks(rng)
    z1, _ = _walks(rng, persistent=0.2)
    m = anytime_multiplier(d / 28, confidence_level=0.95)
    up0, up1 = (z0 > m).any(axis=1).mean(), (z1 > m).any(axis=1).mean()
    assert up1 <= up0 + 3 * math.sqrt(up0 * (1 - up0) / R)  # measured 0.0037 against 0.0099


def test_bounds_are_estimate_plus_minus_multiplier_times_se():
    b = anytime_bounds([0.02, np.nan, 1.1], [0.01, np.nan, 0.05], units=7 * 1200, planned_units=28 * 1200)
    m = float(anytime_multiplier(0.25))
    assert b.multiplier == pytest.approx(m) and b.information_ratio == 0.25
    np.testing.assert_allclose(b.low, [0.02 - m * 0.01, np.nan, 1.1 - m * 0.05])
    np.testing.assert_allclose(b.high, [0.02 + m * 0.01, np.nan, 1.1 + m * 0.05])
    # width relative to the fixed 95 % interval after 7, 14 and 28 of 28 planned days
    ratios = [anytime_bounds(0.0, 1.0, units=d, planned_units=28).width_ratio for d in (7, 14, 28)]
    np.testing.assert_allclose(ratios, [1.6588, 1.5708, 1.5486], atol=1e-4)


@pytest.mark.parametrize("level", [0.5, 0.8, 0.9, 0.95, 0.975, 0.99, 0.999])
def test_fixed_multiplier_is_the_normal_quantile_to_the_last_bit(level):
    # computed with scipy.special.ndtri (the estimate step leaves scipy.stats unloaded): the plain formula
    b = anytime_bounds(0.0, 1.0, units=7, planned_units=28, confidence_level=level)
    assert b.fixed_multiplier == float(st.norm.ppf(0.5 + level / 2))


@pytest.mark.parametrize("kwargs, match", [
    (dict(units=0, planned_units=10), "`units` must be a finite number > 0"),
    (dict(units=5, planned_units=float("nan")), "`planned_units` must be a finite number > 0"),
    (dict(units=5, planned_units=10, confidence_level=1.0), r"`confidence_level` must be in \(0, 1\)"),
])
def test_bad_arguments_are_one_line_errors(kwargs, match):
    with pytest.raises(InputError, match=match):
        anytime_bounds(0.1, 0.01, **kwargs)


def test_negative_standard_errors_and_mismatched_shapes_are_refused():
    with pytest.raises(InputError, match="`std_error` must be >= 0"):
        anytime_bounds([0.1], [-0.01], units=1, planned_units=2)
    with pytest.raises(InputError, match="one shape"):
        anytime_bounds([0.1, 0.2], [0.01], units=1, planned_units=2)


def test_planned_days_from_the_spec():
    def exp(**extra):
        doc = {"experiments": [{"id": "harbor-tiles", "control_arm": "a", **extra, "arms": [
            {"name": "a", "share": 0.5, "position_weights": [1.0]}, {"name": "b", "share": 0.5, "position_weights": [1.0, 0.5]}]}]}
        return parse_experiments(doc)["harbor-tiles"]

    assert planned_days(exp()) == DEFAULT_PLANNED_DAYS == 28
    assert planned_days(exp(start="2026-03-01")) == 28  # open-ended
    assert planned_days(exp(start="2026-03-01", end="2026-03-21")) == 21
    # burn-in days and listed excluded days inside the range are not combined; one outside is ignored
    assert planned_days(exp(start="2026-03-01", end="2026-03-21", burn_in_days=2,
                            exclude_days=["2026-03-09", "2026-04-01"])) == 18
    assert planned_days(exp(start=dt.date(2026, 3, 1), end=dt.date(2026, 3, 1), burn_in_days=3)) == 1
