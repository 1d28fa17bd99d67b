"""The simulator for every payment rule, with and without a floor and quality factors.

Checked independently of the estimator:
* the gsp bid function against scipy.integrate.solve_ivp of the same first-order condition written
  as an ODE (two slots, three bidders), and the first-price bid with a reserve against its closed
  form b(v) = v - (v^n - r^n) / (n v^(n-1)) for U[0,1] values, one slot (Krishna, V. 2010, Auction
  Theory, 2nd ed., ch. 2; recalled from memory, re-derived from b = v - int_r^v G / G(v), G = v^(n-1));
* no profitable deviation: v(q) x(q') - p(q') <= v(q) x(q) - p(q) on a grid of deviations, with p
  the expected price of a bidder who bids as quantile q' under each rule's own pricing (own bid;
  next-lower eligible bid or the floor, Edelman, Ostrovsky & Schwarz 2007; VCG externality prices,
  Varian 2007), by Gauss-Legendre quadrature over the order statistics below;
* revenue equivalence (Myerson, R. 1981, Optimal auction design, Math. Oper. Res. 6(1)): realized
  revenue of simulated auctions priced by the rule itself equals n [r (1-q*) x(q*) +
  int_{q*}^1 (1-q) v x' dq] of the mixture x, by scipy.integrate.quad, within Monte Carlo error;
* Gomes, R. & Sweeney, K. (2014), Bayes-Nash equilibria of the generalized second-price auction,
  Games Econ. Behav. 86: the symmetric equilibrium need not exist; the Volterra solution then
  decreases, and the values recovered from the bids it would produce are not monotone.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats as st
from scipy import integrate, special

from counterbid.estimators import (
    InputError,
    allocation_rule,
    equilibrium_bid_function,
    expected_revenue_per_auction,
    mixture_rule,
    parse_experiments,
    simulate_experiment,
)
from counterbid.estimators.payment_rules import per_click_prices

VALUES = st.lognorm(0.5, scale=0.8)
ARMS = {"deep": [0.5, 0.3, 0.1], "steep": [0.6, 0.2]}
SHARES = [0.6, 0.4]
N = 4
FLOOR = float(VALUES.ppf(0.3))


def experiment():
    doc = {"experiments": [{"id": "rules", "control_arm": "deep", "arms": [
        {"name": a, "share": s, "position_weights": w} for (a, w), s in zip(ARMS.items(), SHARES)]}]}
    return parse_experiments(doc)["rules"]


def mixture(n=N):
    return mixture_rule([allocation_rule(w, n) for w in ARMS.values()], SHARES)


def myerson_mixture_quad(values, mix, r=0.0):
    """n [r (1-q*) x(q*) + int_{q*}^1 (1-q) v x'] by scipy.integrate.quad (Myerson 1981)."""
    qs = float(values.cdf(r)) if r else 0.0
    val, _ = integrate.quad(lambda q: (1 - q) * values.ppf(q) * float(mix.derivative(q)), qs, 1, limit=400, epsabs=1e-12)
    return mix.n_bidders * (r * (1 - qs) * float(mix.value(qs)) + val)


# --- bid functions against outside references ---------------------------------------------------

@pytest.mark.parametrize("alpha", [0.3, 0.5, 0.8])
def test_gsp_two_slots_matches_ode(alpha):
    # n = 3, weights (1, alpha), U[0,1]: p(q) = 2 int_0^q b s ds + 2 alpha (1-q) int_0^q b ds, and
    # p' = v x' gives I' = b = (v x' + 2 alpha I) / (2q + 2 alpha (1-q)), I = int_0^q b.
    def rhs(q, i):
        dx = 2 * q + 2 * alpha * (1 - 2 * q)
        return [(q * dx + 2 * alpha * i[0]) / (2 * q + 2 * alpha * (1 - q))]

    sol = solve = integrate.solve_ivp(rhs, (0, 1), [0.0], dense_output=True, rtol=1e-12, atol=1e-14)
    assert solve.success
    q = np.linspace(0, 1, 41)
    b_ode = np.array([rhs(t, sol.sol(t))[0] for t in q])
    bf = equilibrium_bid_function(st.uniform(0, 1), allocation_rule([1.0, alpha], 3), payment_rule="gsp")
    np.testing.assert_allclose(bf(q), b_ode, atol=1e-8)


@pytest.mark.parametrize("n,r", [(2, 0.5), (4, 0.3)])
def test_first_price_reserve_closed_form(n, r):
    bf = equilibrium_bid_function(st.uniform(0, 1), allocation_rule([1.0], n), floor=r)
    v = bf.grid
    assert v[0] == pytest.approx(r)
    np.testing.assert_allclose(bf.bids, v - (v**n - r**n) / (n * v ** (n - 1)), atol=1e-9)


# --- no profitable deviation --------------------------------------------------------------------

def interim_payment(payment_rule, bid_fn, values, mix, q_dev, r, qs):
    """Expected payment of a bidder who bids b(q_dev), from the prices of the rule itself.

    Rank k has probability c_k (1-q')^(k-1) q'^(n-k); the n-k bidders below have quantiles
    uniform on [0, q'] and those below q* are ineligible (they count as the floor).
    """
    n = mix.n_bidders
    big_w = np.r_[mix.position_weights, 0.0]
    c = special.comb(n - 1, np.arange(n))
    if payment_rule == "first_price":
        return float(bid_fn(q_dev)) * float(mix.value(q_dev))
    total = 0.0
    for k in range(1, n + 1):
        m = n - k
        rank_prob = c[k - 1] * (1 - q_dev) ** (k - 1) * q_dev**m
        if payment_rule == "gsp":
            # next-lower bid: the highest of the m below, density m s^(m-1) / q'^m on [0, q'].
            if m == 0:
                price = r
            else:
                eligible = integrate.fixed_quad(lambda s: bid_fn(s) * m * s ** (m - 1), qs, q_dev, n=200)[0]
                price = r * (qs / q_dev) ** m + eligible / q_dev**m
            total += big_w[k - 1] * rank_prob * price
        else:
            # VCG: sum_{j >= k} (W_j - W_{j+1}) e'_{j+1}; e'_{j+1} is the (j-k+1)-th highest below,
            # q' U with U ~ Beta(m - t + 1, t), or the floor when ineligible or absent.
            pay = 0.0
            for j in range(k, n + 1):
                t = j - k + 1
                if t > m:
                    expected = r
                else:
                    u = st.beta(m - t + 1, t)
                    cut = qs / q_dev
                    expected = r * float(u.cdf(cut)) + integrate.fixed_quad(
                        lambda x: values.ppf(q_dev * x) * u.pdf(x), cut, 1.0, n=200)[0]
                pay += (big_w[j - 1] - big_w[j]) * expected
            total += rank_prob * pay
    return total


def max_deviation_gain(payment_rule, floor, bid_fn=None):
    """Largest gain v(q) x(q') - p(q') - [v(q) x(q) - p(q)] over deviations q' != q (and, above the
    floor, over bidding below it), at seven quantiles q. <= 0 in equilibrium."""
    values, mix = VALUES, mixture()
    r, qs = (0.0, 0.0) if floor is None else (floor, float(VALUES.cdf(floor)))
    if bid_fn is None:
        bid_fn = equilibrium_bid_function(values, mix, payment_rule=payment_rule, floor=floor)
    truthful = [0.05, 0.2, 0.35, 0.5, 0.65, 0.8, 0.95]
    deviations = np.unique(np.r_[np.linspace(max(qs, 0.005), 0.99, 40), [t for t in truthful if t >= qs]])
    pay = {qd: interim_payment(payment_rule, bid_fn, values, mix, qd, r, qs) for qd in deviations}
    gains = []
    for q in truthful:
        v = float(values.ppf(q))
        own = v * float(mix.value(q)) - pay[q] if q >= qs else 0.0
        options = [v * float(mix.value(qd)) - pay[qd] for qd in deviations if qd != q]
        if q >= qs:
            options.append(0.0)  # bid below the floor
        gains.append(max(options) - own)
    return max(gains)


@pytest.mark.parametrize("payment_rule", ["first_price", "gsp", "vcg"])
@pytest.mark.parametrize("floor", [None, FLOOR])
def test_no_profitable_deviation(payment_rule, floor):
    # The nearest deviations lose ~2e-6 to 6e-6 (second order in q' - q); quadrature error ~1e-9.
    assert max_deviation_gain(payment_rule, floor) <= 1e-7


@pytest.mark.parametrize("payment_rule,wrong", [("gsp", "first_price"), ("first_price", "gsp")])
def test_deviation_check_detects_wrong_bids(payment_rule, wrong):
    # The check can fail: first-price bids in a next-price auction shade too much (raising the bid
    # pays), next-price bids in a pay-your-bid auction shade too little (lowering it pays).
    # (Under vcg the others' prices are their values whatever the bid function, so no such case.)
    bids = equilibrium_bid_function(VALUES, mixture(), payment_rule=wrong)
    assert max_deviation_gain(payment_rule, None, bid_fn=bids) > 1e-3


def test_sub_floor_bidders_cannot_gain():
    # A bidder with value below the floor would pay at least the floor per click.
    mix = mixture()
    bid_fn = equilibrium_bid_function(VALUES, mix, payment_rule="gsp", floor=FLOOR)
    qs = float(VALUES.cdf(FLOOR))
    v = float(VALUES.ppf(0.8 * qs))
    for qd in np.linspace(qs, 0.9, 12):
        assert v * float(mix.value(qd)) - interim_payment("gsp", bid_fn, VALUES, mix, qd, FLOOR, qs) < 0


# --- revenue equivalence: simulated auctions priced by the rule itself ---------------------------

def realized_revenue_z(payment_rule, floor, quality=None, n_auctions=40_000, seed=3):
    """z of the mean realized revenue per auction against Myerson's formula for the mixture."""
    exp = experiment()
    log = simulate_experiment(VALUES, exp, n_bidders=N, n_auctions=n_auctions, rng=seed,
                              payment_rule=payment_rule, floor=floor, quality=quality)
    factor = log["quality"].to_numpy() if quality is not None else np.ones(len(log))
    effective = log["bid"].to_numpy() * factor
    arm = (log["arm"] == "steep").to_numpy().astype(int)
    weights = np.array([np.r_[w, np.zeros(N - len(w))] for w in ARMS.values()])
    price = per_click_prices(log["auction_id"].to_numpy(), effective, arm, weights,
                             payment_rule=payment_rule, floor=floor or 0.0) / factor  # currency per click
    # Expected clicks: position weight x quality (positions are logged for shown bids only).
    position = log["position"].fillna(0).to_numpy().astype(int)
    clicks = np.where(position > 0, weights[arm, np.maximum(position - 1, 0)], 0.0) * factor
    per_auction = np.bincount(log["auction_id"].to_numpy(), weights=np.nan_to_num(price) * clicks)
    truth = myerson_mixture_quad(VALUES, mixture(), floor or 0.0)
    se = per_auction.std(ddof=1) / np.sqrt(per_auction.size)
    return (per_auction.mean() - truth) / se, per_auction.mean(), truth, se


@pytest.mark.parametrize("payment_rule", ["first_price", "gsp", "vcg"])
@pytest.mark.parametrize("floor", [None, FLOOR])
def test_revenue_equivalence(payment_rule, floor):
    # Fixed seed; the tolerance of 4 standard errors of the Monte Carlo mean (SE ~0.3 % here).
    z, *_ = realized_revenue_z(payment_rule, floor)
    assert abs(z) < 4, z


@pytest.mark.parametrize("payment_rule", ["first_price", "gsp", "vcg"])
def test_revenue_equivalence_with_quality(payment_rule):
    z, *_ = realized_revenue_z(payment_rule, FLOOR, quality=st.uniform(0.5, 0.5), seed=5)
    assert abs(z) < 4, z


def test_truth_with_floor_matches_quad():
    truth = sum(s * expected_revenue_per_auction(VALUES, w, N, floor=FLOOR) for s, w in zip(SHARES, ARMS.values()))
    assert truth == pytest.approx(myerson_mixture_quad(VALUES, mixture(), FLOOR), rel=1e-9)


# --- the log convention ---------------------------------------------------------------------------

def test_log_convention_floor_and_quality():
    exp = experiment()
    log = simulate_experiment(VALUES, exp, n_bidders=N, n_auctions=5000, rng=8, payment_rule="gsp",
                              floor=FLOOR, quality=st.uniform(0.5, 0.5))
    effective = log["bid"] * log["quality"]
    below = effective < FLOOR
    assert (log.groupby("auction_id").size() == N).all()  # n counts every bidder
    assert log.loc[below, "position"].isna().all()  # sub-floor: never shown
    # share of sub-floor bids estimates q* = F(r) = 0.3 (binomial SE ~0.003)
    assert below.mean() == pytest.approx(0.3, abs=0.015)
    # positions follow effective bids, not submitted bids
    shown = log.dropna(subset=["position"]).assign(effective=effective)
    ranks = shown.groupby("auction_id")["effective"].rank(ascending=False).astype(int)
    assert (ranks.to_numpy() == shown["position"].to_numpy()).all()
    assert (log["quality"] > 0).all() and set(log.columns) >= {"value", "clicks", "quality"}


def test_the_spec_rule_and_floor_are_the_simulator_defaults():
    """A spec that says gsp with a floor simulates gsp bids with that floor unless told otherwise."""
    base = experiment()
    spec = parse_experiments({"experiments": [{"id": "rules", "control_arm": "deep", "payment_rule": "gsp",
                                               "floor": FLOOR, "arms": [
        {"name": a, "share": s, "position_weights": w} for (a, w), s in zip(ARMS.items(), SHARES)]}]})["rules"]
    from_spec = simulate_experiment(VALUES, spec, n_bidders=N, n_auctions=400, rng=3)
    explicit = simulate_experiment(VALUES, base, n_bidders=N, n_auctions=400, rng=3, payment_rule="gsp", floor=FLOOR)
    assert from_spec.equals(explicit)
    assert from_spec.loc[from_spec["bid"] < FLOOR, "position"].isna().all()
    plain = simulate_experiment(VALUES, base, n_bidders=N, n_auctions=400, rng=3)  # first price, no floor
    assert not plain.equals(explicit) and plain["position"].notna().sum() > explicit["position"].notna().sum()


def test_vcg_bids_are_values():
    log = simulate_experiment(VALUES, experiment(), n_bidders=N, n_auctions=200, rng=1, payment_rule="vcg")
    np.testing.assert_array_equal(log["bid"], log["value"])


# --- where the symmetric gsp equilibrium does not exist ----------------------------------------

def gsp_values_from_bids(bid_quantiles, q, rule):
    """v = p'/x' with p' = Q D - sum_{k>=2} W_k c_k (k-1) (1-q)^(k-2) (n-k) int_0^q Q s^(n-k-1) ds,
    the running integrals by scipy's cumulative trapezoid (Gomes & Sweeney 2014 payment)."""
    n = rule.n_bidders
    big_w = rule.position_weights
    c = special.comb(n - 1, np.arange(n))
    d = sum(big_w[k - 1] * c[k - 1] * (n - k) * (1 - q) ** (k - 1) * q ** (n - k - 1) for k in range(1, n))
    lower = 0.0
    for k in range(2, n):
        m = n - k
        running = m * integrate.cumulative_trapezoid(bid_quantiles * q ** (m - 1), q, initial=0.0)
        lower = lower + big_w[k - 1] * c[k - 1] * (k - 1) * (1 - q) ** (k - 2) * running
    return (bid_quantiles * d - lower) / rule.derivative(q)


def test_gsp_equilibrium_missing_is_visible():
    # Four nearly equal slots, six bidders, U[0,1]: the solution of the first-order condition
    # falls around q = 0.8-0.9, so no symmetric monotone equilibrium exists (Gomes & Sweeney 2014).
    q = (np.arange(20_000) + 0.5) / 20_000
    flat = allocation_rule([1.0, 0.99, 0.98, 0.97], 6)
    bids = equilibrium_bid_function(st.uniform(0, 1), flat, payment_rule="gsp")(q)
    assert np.min(np.diff(bids)) < 0
    # The bids such a market would log, ranked (the monotone rearrangement), inverted by the gsp
    # rule: the recovered values fall near the top (by ~2e-4 per step of 5e-5 in q, a slope of
    # about -4), which is what a monotone-values check on the data can see.
    v = gsp_values_from_bids(np.sort(bids), q, flat)
    falling = np.diff(v[10:-10]) < -1e-5
    assert falling.any() and np.min(np.diff(v[10:-10])) < -1e-4
    # Not every missing equilibrium shows this way: with two slots (1, 0.8) and three bidders the
    # solution also falls near the top (solve_ivp agrees, test_gsp_two_slots_matches_ode), yet its
    # rearranged bids invert to increasing values (a different value distribution rationalizes
    # them, topping at ~1.03 instead of 1).
    two = allocation_rule([1.0, 0.8], 3)
    bids = equilibrium_bid_function(st.uniform(0, 1), two, payment_rule="gsp")(q)
    assert np.min(np.diff(bids)) < 0
    v = gsp_values_from_bids(np.sort(bids), q, two)
    assert np.min(np.diff(v[10:-10])) > 0 and v[-1] > 1.02
    # Where the equilibrium exists the recovery is monotone and gives the values back (no false alarm).
    steep = allocation_rule([1.0, 0.6, 0.3], 6)
    bids = equilibrium_bid_function(st.uniform(0, 1), steep, payment_rule="gsp")(q)
    assert np.min(np.diff(bids)) > 0
    np.testing.assert_allclose(gsp_values_from_bids(bids, q, steep)[10:-10], q[10:-10], atol=1e-5)


# --- bad inputs -------------------------------------------------------------------------------

def test_bad_inputs():
    exp = experiment()
    with pytest.raises(InputError, match="above every value"):
        simulate_experiment(st.uniform(0, 1), exp, n_bidders=3, n_auctions=10, floor=1.5)
    with pytest.raises(InputError, match="payment_rule"):
        simulate_experiment(st.uniform(0, 1), exp, n_bidders=3, n_auctions=10, payment_rule="english")
    with pytest.raises(InputError, match="quality"):
        simulate_experiment(st.uniform(0, 1), exp, n_bidders=3, n_auctions=100, quality=st.uniform(1, 2), rng=1)
    with pytest.raises(InputError, match="floor"):
        expected_revenue_per_auction(st.uniform(0, 1), [1.0], 3, floor=-0.1)


@pytest.mark.parametrize("payment_rule", ["first_price", "gsp", "vcg"])
def test_a_lone_bidder_above_the_floor_bids_a_price_it_pays(payment_rule):
    """One bidder: the price is the floor whatever the bid (pay-your-bid: the bid is the floor;
    next-price and VCG: bidding the value is weakly dominant, so b = v). Every shown bid reaches
    the floor, and the mean revenue per auction is r (1 - F(r)) w_1 (a lone bidder pays the reserve: common practice),
    within 4 standard errors of its own sampling spread."""
    log = simulate_experiment(VALUES, experiment(), n_bidders=1, n_auctions=20_000, rng=11,
                              payment_rule=payment_rule, floor=FLOOR)
    shown = log["position"].notna().to_numpy()
    assert shown.any() and (log.loc[shown, "bid"] >= FLOOR * (1 - 1e-12)).all()
    if payment_rule == "first_price":
        np.testing.assert_allclose(log.loc[shown, "bid"], FLOOR, rtol=1e-9)
    else:
        np.testing.assert_allclose(log.loc[shown, "bid"], log.loc[shown, "value"], rtol=1e-9)
    top = np.array([w[0] for w in ARMS.values()])[(log["arm"] == "steep").to_numpy().astype(int)]
    per_auction = np.where(shown, FLOOR * top, 0.0)  # each shown bidder pays the floor per click
    truth = FLOOR * VALUES.sf(FLOOR) * float(np.dot(SHARES, [w[0] for w in ARMS.values()]))
    se = per_auction.std(ddof=1) / np.sqrt(per_auction.size)
    assert abs(per_auction.mean() - truth) < 4 * se
