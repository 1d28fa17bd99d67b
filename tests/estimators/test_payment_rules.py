"""Order-statistic weights for the three payment rules and a shared floor, against outside references.

Sources named beside each check:
* Vickrey, W. (1961), "Counterspeculation, auctions, and competitive sealed tenders", J. Finance
  16(1): one slot, next-price or truthful prices -> bids equal values; U[0,1] revenue (n-1)/(n+1).
* Myerson, R. (1981), "Optimal auction design", Math. Oper. Res. 6(1): revenue
  r(1-q*)y(q*) + int_{q*}^1 (1-q) v y' dq; one slot with reserve r and U[0,1] values:
  (n-1)/(n+1) + r^n - 2n r^(n+1)/(n+1) (two bidders, r = 1/2: 5/12).
* Edelman, Ostrovsky & Schwarz (2007) and Varian (2007): next-lower-bid and VCG per-click prices of
  position auctions; Gomes & Sweeney (2014): expected payment of the generalized second-price
  auction in the Bayesian setting, p(q) = sum_k W_k c_k (1-q)^(k-1) E[next-lower bid], here
  evaluated by scipy.integrate and differentiated by finite differences (plug-in v = p'/x').
Weights are applied to bids on exact quantile grids, (i - 1/2)/N, as in test_closed_forms.py.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats as st
from scipy import integrate, special

from counterbid.estimators import InputError, allocation_rule, equilibrium_bid_function, mixture_rule
from counterbid.estimators.order_weights import Floor, revenue_weights, welfare_weights
from counterbid.estimators.payment_rules import per_click_prices

DISTRIBUTIONS = {"beta": st.beta(2.0, 5.0, scale=3.0), "lognormal": st.lognorm(0.5, scale=0.8)}
ARMS = {"deep": [0.5, 0.3, 0.1], "steep": [0.6, 0.2]}
SHARES = [0.7, 0.3]
N_GRID = 2**14


def estimate(weights, bids, n, floor=None):
    """Per-auction estimate from bids: sum of clamped sorted bids x increments + boundary terms."""
    b = np.sort(bids)
    if floor is not None:
        b = np.maximum(b, floor.value)
    inc = weights.increments(b.size)
    return n * (float(b @ inc) + weights.top * b[-1] - weights.bottom * b[0] + weights.floor_term)


def grid_quantiles(big_n=N_GRID):
    return (np.arange(big_n) + 0.5) / big_n


def rules(n):
    arms = [allocation_rule(w, n) for w in ARMS.values()]
    return arms, mixture_rule(arms, SHARES)


def myerson_quad(values, y, n, r=0.0, qs=0.0):
    """n [r (1-q*) y(q*) + int_{q*}^1 (1-q) F^-1(q) y'(q) dq] by scipy.integrate.quad (Myerson 1981)."""
    val, _ = integrate.quad(lambda q: (1 - q) * values.ppf(q) * float(y.derivative(q)), qs, 1, limit=400, epsabs=1e-13)
    return n * (r * (1 - qs) * float(y.value(qs)) + val)


def welfare_quad(values, y, n, qs=0.0):
    val, _ = integrate.quad(lambda q: values.ppf(q) * float(y.value(q)), qs, 1, limit=400, epsabs=1e-13)
    return n * val


def observed_bids(values, rule, payment_rule, floor_value=None, big_n=N_GRID):
    """Bids at the exact grid: equilibrium bids above the floor, values (sub-floor) below."""
    q = grid_quantiles(big_n)
    v = values.ppf(q)
    if payment_rule == "vcg":
        bids = v.copy()
    else:
        bids = equilibrium_bid_function(values, rule, payment_rule=payment_rule, floor=floor_value,
                                        grid_intervals=8192)(q)
    if floor_value is not None:
        below = v < floor_value
        bids[below] = v[below]
        return bids, Floor(floor_value, float(np.mean(below)))
    return bids, None


# --- one slot: Vickrey (1961) and Myerson (1981) closed forms ------------------------------------

@pytest.mark.parametrize("payment_rule", ["gsp", "vcg"])
@pytest.mark.parametrize("n", [2, 3, 5, 10])
def test_one_slot_bids_are_values_and_revenue(payment_rule, n):
    # Vickrey 1961: with one slot, next-price and truthful prices both make bids equal values.
    rule = allocation_rule([1.0], n)
    bf = equilibrium_bid_function(st.uniform(0, 1), rule, payment_rule=payment_rule)
    np.testing.assert_allclose(bf.bids, bf.grid, atol=1e-12)
    q = grid_quantiles(20_000)
    w = revenue_weights(rule, rule, q.size, payment_rule=payment_rule)
    assert estimate(w, q, n) == pytest.approx((n - 1) / (n + 1), abs=1e-8)


@pytest.mark.parametrize("payment_rule", ["first_price", "gsp", "vcg"])
@pytest.mark.parametrize("n,r", [(2, 0.5), (3, 0.3), (5, 0.6)])
def test_one_slot_reserve_uniform(payment_rule, n, r):
    # Myerson 1981: one slot, reserve r, U[0,1]: (n-1)/(n+1) + r^n - 2n r^(n+1)/(n+1); n=2, r=1/2: 5/12.
    truth = (n - 1) / (n + 1) + r**n - 2 * n * r ** (n + 1) / (n + 1)
    if (n, r) == (2, 0.5):
        assert truth == pytest.approx(5 / 12, abs=1e-15)
    rule = allocation_rule([1.0], n)
    big_n = 20_000  # r * N is an integer: the sub-floor share is exactly r
    bids, floor = observed_bids(st.uniform(0, 1), rule, payment_rule, r, big_n)
    assert floor.quantile == pytest.approx(r, abs=1e-12)
    w = revenue_weights(rule, rule, big_n, payment_rule=payment_rule, floor=floor)
    # Midpoint grid, O(N^-2) quadrature error; the bid function's own error is ~1e-9.
    assert estimate(w, bids, n, floor) == pytest.approx(truth, abs=2e-7)


# --- multi-slot gsp and vcg against quad of Myerson's formula -----------------------------------

@pytest.mark.parametrize("dist", sorted(DISTRIBUTIONS))
@pytest.mark.parametrize("payment_rule", ["first_price", "gsp", "vcg"])
@pytest.mark.parametrize("with_floor", [False, True])
def test_multi_slot_against_quad(dist, payment_rule, with_floor):
    values, n = DISTRIBUTIONS[dist], 5
    arms, mix = rules(n)
    r = float(values.ppf(0.35)) if with_floor else None
    bids, floor = observed_bids(values, mix, payment_rule, r)
    qs = floor.quantile if floor else 0.0
    for y in arms:
        w = revenue_weights(y, mix, bids.size, payment_rule=payment_rule, floor=floor)
        # Truth at the sample's own q* (the grid's share of sub-floor bids, within 1/N of F(r)).
        truth = myerson_quad(values, y, n, r or 0.0, qs)
        # Tolerance: grid error O(N^-2) plus the log-normal top beyond the last midpoint.
        assert estimate(w, bids, n, floor) == pytest.approx(truth, rel=2e-6, abs=2e-7)
        if payment_rule == "first_price":  # its top term needs b at q = 1 (see test_closed_forms)
            continue
        # Welfare weights keep their weight up to q = 1 (no (1 - q) factor), so the midpoint grid's
        # own quadrature error shows: ~2e-6 (Beta, whose quantile has an infinite slope at 1) and
        # ~4e-5 (log-normal, unbounded) relative, with the values themselves as bids (vcg). gsp bids
        # inverted by the gsp weights must give that same grid sum to 1e-7.
        ww = welfare_weights(y, mix, bids.size, payment_rule=payment_rule, floor=floor)
        got = estimate(ww, bids, n, floor)
        assert got == pytest.approx(welfare_quad(values, y, n, qs), rel=1e-4)
        values_as_bids, _ = observed_bids(values, mix, "vcg", r)
        same_grid = estimate(welfare_weights(y, mix, bids.size, payment_rule="vcg", floor=floor), values_as_bids, n, floor)
        assert got == pytest.approx(same_grid, rel=1e-7)


def test_floor_boundary_term_alone():
    # The boundary term is r (1 - q*) y(q*) in Myerson's formula; the weights' floor_term is that
    # minus what the clamped sub-floor bids contribute: check term + r Omega(q*) = Myerson's boundary
    # minus the rule-specific pieces, for vcg (bottom = 0), where Omega is closed form.
    n = 4
    y = allocation_rule([0.5, 0.3, 0.1], n)
    floor = Floor(0.7, 0.4)
    w = revenue_weights(y, y, 10_000, payment_rule="vcg", floor=floor)
    omega_at = float(w.at(np.array([floor.quantile]))[0])
    assert w.floor_term + floor.value * omega_at == pytest.approx(floor.value * (1 - 0.4) * float(y.value(0.4)), abs=1e-10)
    # d term / d q* = -r y(q*), by central differences of the term itself.
    eps = 1e-6
    up = revenue_weights(y, y, 100, payment_rule="vcg", floor=Floor(0.7, 0.4 + eps)).floor_term
    dn = revenue_weights(y, y, 100, payment_rule="vcg", floor=Floor(0.7, 0.4 - eps)).floor_term
    assert (up - dn) / (2 * eps) == pytest.approx(w.floor_slope, rel=1e-7)
    assert w.floor_slope == pytest.approx(-0.7 * float(y.value(0.4)), rel=1e-12)


# --- gsp weights against a direct plug-in of v = p'/x' -----------------------------------------

def _plugin(mix, y, b, r, qs, metric):
    """Revenue or welfare per bidder with v = p'/x': p by fixed-order Gauss-Legendre, p' by
    fourth-order central differences, then scipy.integrate.quad (Gomes & Sweeney 2014 payment)."""
    n = mix.n_bidders
    big_w = mix.position_weights
    c = special.comb(n - 1, np.arange(n))

    def p(q):
        total = 0.0
        for k in range(1, n + 1):
            m = n - k
            part = r * qs**m if m else r
            if m:
                part += m * integrate.fixed_quad(lambda s: b(s) * s ** (m - 1), qs, q, n=60)[0]
            total += big_w[k - 1] * c[k - 1] * (1 - q) ** (k - 1) * part
        return total

    def v(q, h=1e-4):
        dp = (-p(q + 2 * h) + 8 * p(q + h) - 8 * p(q - h) + p(q - 2 * h)) / (12 * h)
        return dp / float(mix.derivative(q))

    if metric == "revenue":
        val = integrate.quad(lambda q: (1 - q) * v(q) * float(y.derivative(q)), qs, 1, limit=200, epsabs=1e-12)[0]
        return r * (1 - qs) * float(y.value(qs)) + val
    return integrate.quad(lambda q: v(q) * float(y.value(q)), qs, 1, limit=200, epsabs=1e-12)[0]


@pytest.mark.parametrize("qs", [0.0, 0.3])
def test_gsp_weights_match_plugin(qs):
    # Any smooth increasing bid quantile function works: the weights are an identity in b.
    n = 5
    arms, mix = rules(n)

    def b(s):
        return 0.2 + s + 0.3 * s**2 + 0.05 * np.sin(4 * s)

    r = float(b(qs)) if qs else 0.0
    floor = Floor(r, qs) if qs else None
    mid = grid_quantiles()
    bc = np.maximum(b(mid), r)
    for y in arms:
        for metric, make in (("revenue", revenue_weights), ("welfare", welfare_weights)):
            w = make(y, mix, N_GRID, payment_rule="gsp", floor=floor)
            est = float(bc @ np.diff(w.values)) + w.top * b(1.0) + w.floor_term
            assert est == pytest.approx(_plugin(mix, y, b, r, qs, metric), abs=1e-8), metric


def test_gsp_mixture_weights_are_direct_expected_payment():
    # For y = x (the mixture that ran) the gsp weight is the expected price paid directly:
    # E[p] = int b(s) sum_k W_k c_k (n-k)/k s^(n-k-1) (1-s)^k ds (swap the order in p(q) above).
    n = 6
    _, mix = rules(n)
    w = revenue_weights(mix, mix, 4096, payment_rule="gsp")
    k = np.arange(1, n)
    s = w.grid[:, None]
    dens = mix.position_weights[k - 1] * special.comb(n - 1, k - 1) * (n - k) / k * s ** (n - k - 1) * (1 - s) ** k
    direct = integrate.cumulative_simpson(dens.sum(axis=1), x=w.grid, initial=0.0)
    np.testing.assert_allclose(w.values, direct, atol=1e-10)


@pytest.mark.parametrize("payment_rule", ["gsp", "vcg", "first_price"])
@pytest.mark.parametrize("floor", [None, Floor(0.4, 0.25)])
def test_weights_linear_in_target(payment_rule, floor):
    # The estimator's mixture shortcut: the mixture's weights are the share-weighted arms' weights.
    n = 5
    arms, mix = rules(n)
    per_arm = [revenue_weights(y, mix, 3000, payment_rule=payment_rule, floor=floor) for y in arms]
    whole = revenue_weights(mix, mix, 3000, payment_rule=payment_rule, floor=floor)
    np.testing.assert_allclose(sum(s * w.values for s, w in zip(SHARES, per_arm)), whole.values, atol=1e-12)
    assert sum(s * w.floor_term for s, w in zip(SHARES, per_arm)) == pytest.approx(whole.floor_term, abs=1e-12)
    assert sum(s * w.floor_slope for s, w in zip(SHARES, per_arm)) == pytest.approx(whole.floor_slope, abs=1e-12)


def test_gsp_one_slot_weights_equal_vcg():
    # One slot: next price is the truthful price (Vickrey 1961), so both inversions coincide.
    rule = allocation_rule([1.0], 4)
    a = revenue_weights(rule, rule, 2000, payment_rule="gsp")
    b = revenue_weights(rule, rule, 2000, payment_rule="vcg")
    np.testing.assert_allclose(a.values, b.values, atol=1e-12)


def test_gsp_welfare_not_identified_when_top_weights_tie():
    n = 4
    tie = allocation_rule([0.5, 0.5, 0.1], n)
    w = welfare_weights(tie, tie, 1000, payment_rule="gsp")
    assert np.isnan(w.top) and np.isnan(w.bottom)
    assert np.isfinite(revenue_weights(tie, tie, 1000, payment_rule="gsp").values).all()


def test_bad_inputs():
    rule = allocation_rule([1.0], 3)
    with pytest.raises(InputError, match="payment_rule"):
        revenue_weights(rule, rule, 10, payment_rule="second_price")
    with pytest.raises(InputError, match="floor"):
        revenue_weights(rule, rule, 10, floor=0.5)
    with pytest.raises(InputError, match=r"quantile must lie in \[0, 1\]; got 1.5"):
        Floor(0.5, 1.5)
    with pytest.raises(InputError, match="floor"):
        Floor(-1.0, 0.2)


# --- per-click prices of the rule that ran -------------------------------------------------------

def test_per_click_prices_by_hand():
    # One auction, effective bids 5, 3, 2, 1, floor 1.5, positions weigh 0.5, 0.3, 0.1 (Varian 2007;
    # Edelman, Ostrovsky & Schwarz 2007): next price 3, 2, 1.5 (the floor), ineligible;
    # VCG: top (0.2*3 + 0.2*2 + 0.1*1.5)/0.5, second (0.2*2 + 0.1*1.5)/0.3, third 0.1*1.5/0.1.
    auction = np.zeros(4, dtype=int)
    bids = np.array([2.0, 5.0, 1.0, 3.0])  # shuffled
    arm = np.zeros(4, dtype=int)
    weights = np.array([[0.5, 0.3, 0.1]])
    gsp = per_click_prices(auction, bids, arm, weights, payment_rule="gsp", floor=1.5)
    np.testing.assert_allclose(gsp, [1.5, 3.0, np.nan, 2.0])
    vcg = per_click_prices(auction, bids, arm, weights, payment_rule="vcg", floor=1.5)
    np.testing.assert_allclose(vcg, [1.5, 1.15 / 0.5, np.nan, 0.55 / 0.3])
    first = per_click_prices(auction, bids, arm, weights, payment_rule="first_price", floor=1.5)
    np.testing.assert_allclose(first, [2.0, 5.0, np.nan, 3.0])
    # Without a floor the lowest bidder pays nothing and its position weighs 0 anyway.
    gsp0 = per_click_prices(np.r_[auction, 1, 1], np.r_[bids, 4.0, 0.5], np.zeros(6, int), weights, payment_rule="gsp")
    np.testing.assert_allclose(gsp0, [1.0, 3.0, 0.0, 2.0, 0.5, 0.0])


# --- the floor's quantile is estimated: its influence term, against Monte Carlo spread ------------

def floor_estimates(payment_rule, *, big_n=4000, reps=400, floor_q=0.3, seed=1, slope_sign=1.0):
    """Estimates and influence-function standard errors of one arm's revenue from iid bids.

    Bids below the floor ``r = F^-1(floor_q)`` are the sub-floor bidders' values; ``q*`` is
    estimated by their share. The L-statistic part's influence function is Serfling's (1980,
    Approximation Theorems of Mathematical Statistics, sec. 8.2) on the clamped sorted bids; the
    floor adds ``n * floor_slope * (1{b < r} - q*)``.
    """
    values, n = DISTRIBUTIONS["lognormal"], 4
    arms, mix = rules(n)
    y = arms[1]
    r = float(values.ppf(floor_q))
    bid_fn = equilibrium_bid_function(values, mix, payment_rule=payment_rule, floor=r)
    inc = n * np.diff(revenue_weights(y, mix, big_n, payment_rule=payment_rule, floor=Floor(r, floor_q)).values)
    rng = np.random.default_rng(seed)
    est, se = [], []
    for _ in range(reps):
        q = rng.random(big_n)
        v = values.ppf(q)
        b = np.sort(np.where(q >= floor_q, bid_fn(np.maximum(q, floor_q)), v))
        below = b < r
        q_hat = float(below.mean())
        terms = revenue_weights(y, mix, 2, payment_rule=payment_rule, floor=Floor(r, q_hat))  # terms only
        clamped = np.maximum(b, r)
        est.append(float(clamped @ inc) + n * terms.floor_term)
        a = (inc[:-1] + inc[1:]) * big_n / 2 * np.diff(clamped)
        influence = float(a @ np.arange(1, big_n)) / big_n - np.r_[np.cumsum(a[::-1])[::-1], 0.0]
        influence += slope_sign * n * terms.floor_slope * (below - q_hat)
        se.append(np.sqrt(np.sum(influence**2)) / big_n)
    truth = myerson_quad(values, y, n, r, floor_q)
    return np.array(est), np.array(se), truth


@pytest.mark.slow
@pytest.mark.parametrize("payment_rule", ["first_price", "gsp", "vcg"])
def test_floor_standard_error_matches_monte_carlo(payment_rule):
    est, se, truth = floor_estimates(payment_rule, reps=600, seed=7)
    spread = est.std(ddof=1)
    # 600 replications: the Monte Carlo SD is known to ~2.9 % (1/sqrt(2 * 599)); 12 % is 4 of those.
    # Measured (1200 replications, N = 8000): SE / SD = 1.03-1.04 for the three rules.
    assert se.mean() / spread == pytest.approx(1.0, abs=0.12)
    assert abs(est.mean() - truth) < 4 * spread / np.sqrt(est.size)


@pytest.mark.slow
def test_floor_term_is_needed():
    # With q* = 0.6 the threshold's sampling error dominates: without its term the SE is ~0.4 of
    # the Monte Carlo spread.
    est, se, _ = floor_estimates("gsp", floor_q=0.6, reps=300, seed=7, slope_sign=0.0)
    assert se.mean() / est.std(ddof=1) < 0.6


def test_gsp_weight_density_is_the_swapped_integral():
    # omega(s) = h(s) D(s) - sum_{k>=2} W_k c_k (k-1)(n-k) s^(n-k-1) H_k(s), H_k(s) = int_s^1 h (1-q)^(k-2),
    # with every H_k by scipy.integrate.quad, against the derivative of the cumulative weight.
    from scipy.interpolate import CubicSpline

    from counterbid.estimators.allocation import derivative_ratio

    n = 5
    arms, mix = rules(n)
    y = arms[0]
    big_w = mix.position_weights
    c = special.comb(n - 1, np.arange(n))

    def h(q):
        return (1 - q) * float(derivative_ratio(y, mix, q))

    w = revenue_weights(y, mix, payment_rule="gsp")
    slope = CubicSpline(w.grid, w.values).derivative()
    for s in (0.1, 0.35, 0.6, 0.9):
        d = sum(big_w[k - 1] * c[k - 1] * (n - k) * (1 - s) ** (k - 1) * s ** (n - k - 1) for k in range(1, n))
        omega = h(s) * d
        for k in range(2, n):
            upper = integrate.quad(lambda q: h(q) * (1 - q) ** (k - 2), s, 1, epsabs=1e-13)[0]
            omega -= big_w[k - 1] * c[k - 1] * (k - 1) * (n - k) * s ** (n - k - 1) * upper
        assert float(slope(s)) == pytest.approx(omega, abs=1e-9)
