"""``estimate_arms`` on logs of next-price (gsp), VCG and pay-your-bid auctions, with a floor and quality factors.

Sources named beside each check:
* Vickrey, W. (1961), "Counterspeculation, auctions, and competitive sealed tenders", J. Finance
  16(1): one slot under next-price or truthful prices, bids equal values; U[0,1] revenue (n-1)/(n+1).
* Myerson, R. (1981), "Optimal auction design", Math. Oper. Res. 6(1): revenue per bidder
  r (1-q*) y(q*) + int_{q*}^1 (1-q) v(q) y'(q) dq, whatever the payment rule (revenue equivalence);
  one slot, reserve r, U[0,1]: (n-1)/(n+1) + r^n - 2n r^(n+1)/(n+1) (two bidders, r = 1/2: 5/12).
  Multi-slot truths here are that formula by ``scipy.integrate.quad``.
Tolerances are in units of each estimate's own standard error, or derived from the number of
Monte Carlo replications where a spread is compared. The file makes M = 57 comparisons of an
estimate with its truth (2 + 6 one-slot, 12 cases x 4 in the three-arm test, 1 in the wrong-rule
test); at 3 SE a fresh seed would fail one of them with probability up to 1 - 0.9973^57 = 14 %.
Šidák's inequality (Šidák 1967, J. Amer. Statist. Assoc. 62, 626-633: P(every |Z_i| < z) >=
prod P(|Z_i| < z) for jointly normal Z_i, whatever their correlation) bounds it by
1 - (2 Phi(z) - 1)^M, which is 1 % at z = 3.75 (``Z`` below).
"""

from __future__ import annotations

import dataclasses
import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.stats as st
from scipy import integrate

from counterbid.estimators import (
    InputError, allocation_rule, estimate_arms, parse_experiments, prepare_bids, simulate_experiment,
)

pytestmark = pytest.mark.filterwarnings("ignore::counterbid.estimators.EstimatorWarning")

#: Comparisons with a truth in this file, and the Šidák critical value for a 1 % family-wise rate.
N_COMPARISONS = 57
Z = float(st.norm.isf((1 - 0.99 ** (1 / N_COMPARISONS)) / 2))

ARMS = {"control": ([0.5, 0.3, 0.15], 0.6), "steep": ([0.7, 0.2], 0.2), "deep": ([0.4, 0.35, 0.3, 0.2], 0.2)}
VALUES = {"beta": st.beta(2.0, 5.0, scale=3.0), "lognormal": st.lognorm(0.5, scale=0.8)}


def experiment(payment_rule="first_price", floor=None, arms=ARMS, exp_id="quillfen-rules"):
    raw = {"id": exp_id, "payment_rule": payment_rule, "control_arm": next(iter(arms)),
           "arms": [{"name": k, "share": s, "position_weights": w} for k, (w, s) in arms.items()]}
    if floor is not None:
        raw["floor"] = floor
    return parse_experiments({"experiments": [raw]})[exp_id]


def myerson_quad(values, weights, n, floor=None):
    """n [r (1-q*) y(q*) + int_{q*}^1 (1-q) F^-1(q) y'(q) dq] by scipy.integrate.quad (Myerson 1981)."""
    y = allocation_rule(weights, n)
    r, qs = (0.0, 0.0) if floor is None else (floor, float(values.cdf(floor)))
    val, _ = integrate.quad(lambda q: (1 - q) * values.ppf(q) * float(y.derivative(q)), qs, 1, limit=400, epsabs=1e-12)
    return n * (r * (1 - qs) * float(y.value(qs)) + val)


def revenue(out):
    return out.query("metric == 'revenue_per_auction'").set_index("arm")


# --- one slot: closed forms ------------------------------------------------------------------------

@pytest.mark.parametrize("payment_rule", ["gsp", "vcg"])
def test_one_slot_bids_are_values_and_revenue(payment_rule):
    # Vickrey 1961: one slot, next-price or truthful prices -> bids equal values; U[0,1]: (n-1)/(n+1).
    n = 4
    exp = experiment(payment_rule, arms={"one": ([1.0], 1.0)})
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=n, n_auctions=20_000, rng=11, payment_rule=payment_rule)
    np.testing.assert_allclose(bids["bid"], bids["value"], atol=1e-9)
    rev = revenue(estimate_arms(bids, exp).table).loc["one"]
    assert abs(rev["estimate"] - (n - 1) / (n + 1)) < Z * rev["std_error"]


@pytest.mark.parametrize("payment_rule", ["first_price", "gsp", "vcg"])
@pytest.mark.parametrize("n,r", [(2, 0.5), (3, 0.3)])
def test_one_slot_reserve_uniform(payment_rule, n, r):
    # Myerson 1981: one slot, reserve r, U[0,1]: (n-1)/(n+1) + r^n - 2n r^(n+1)/(n+1); two bidders, r = 1/2: 5/12.
    truth = (n - 1) / (n + 1) + r**n - 2 * n * r ** (n + 1) / (n + 1)
    if (n, r) == (2, 0.5):
        assert truth == pytest.approx(5 / 12, abs=1e-15)
    exp = experiment(payment_rule, floor=r, arms={"one": ([1.0], 1.0)})
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=n, n_auctions=30_000, rng=5, payment_rule=payment_rule, floor=r)
    out = estimate_arms(bids, exp)
    rev = revenue(out.table).loc["one"]
    assert abs(rev["estimate"] - truth) < Z * rev["std_error"]
    assert out.payment_rule == payment_rule and out.floor == r


# --- several slots, three arms, every rule, floor and quality --------------------------------------

CASES = [(rule, fl, q) for rule in ("first_price", "gsp", "vcg") for fl in (False, True) for q in (False, True)]


@pytest.mark.parametrize("payment_rule,with_floor,with_quality", CASES)
def test_three_arms_within_three_standard_errors(payment_rule, with_floor, with_quality):
    dist = "lognormal" if with_quality else "beta"
    values, n = VALUES[dist], 5
    floor = float(values.ppf(0.3)) if with_floor else None
    exp = experiment(payment_rule, floor)
    quality = st.uniform(0.5, 0.9) if with_quality else None  # factors in [0.5, 1.4]; w_1 x 1.4 < 1
    bids = simulate_experiment(values, exp, n_bidders=n, n_auctions=20_000, rng=17, payment_rule=payment_rule,
                               floor=floor, quality=quality)
    out = estimate_arms(bids, exp)
    rev = revenue(out.table)
    for arm, (w, _) in ARMS.items():
        truth = myerson_quad(values, w, n, floor)
        assert abs(rev.loc[arm, "estimate"] - truth) < Z * rev.loc[arm, "std_error"], arm
    # The mixture identity: estimated mixture revenue = realized mixture revenue priced by the rule that ran.
    realized = out.table.query("arm == '_mixture' and metric == 'realized_revenue_per_auction'").iloc[0]
    gap = rev.loc["_mixture", "estimate"] - realized["estimate"]
    assert abs(gap) < Z * np.hypot(rev.loc["_mixture", "std_error"], realized["std_error"])
    assert out.quality == with_quality


def test_wrong_rule_is_far_off():
    # The premise: next-price bids read as pay-your-bid overstate every arm by tens of percent.
    values = VALUES["beta"]
    exp = experiment("gsp")
    bids = simulate_experiment(values, exp, n_bidders=5, n_auctions=10_000, rng=3, payment_rule="gsp")
    wrong = revenue(estimate_arms(bids, dataclasses.replace(exp, payment_rule="first_price")).table)
    right = revenue(estimate_arms(bids, exp).table)
    truth = myerson_quad(values, ARMS["control"][0], 5)
    assert wrong.loc["control", "estimate"] > 1.15 * truth
    assert abs(right.loc["control", "estimate"] - truth) < Z * right.loc["control", "std_error"]


# --- standard errors against Monte Carlo spread ------------------------------------------------------

@pytest.mark.slow
@pytest.mark.parametrize("payment_rule,with_floor", [(r, f) for r in ("first_price", "gsp", "vcg") for f in (False, True)])
def test_standard_error_matches_monte_carlo(payment_rule, with_floor):
    # 200 replications of 3000 auctions (4 bidders), cut from one simulated log: the spread's own
    # relative error is ~1/sqrt(2 x 199) = 5 %, so 15 % is three of those. The floor case adds
    # quality factors and the estimated threshold quantile.
    values, n, reps, size = VALUES["lognormal"], 4, 200, 3000
    floor = float(values.ppf(0.3)) if with_floor else None
    quality = st.uniform(0.5, 0.9) if with_floor else None
    exp = experiment(payment_rule, floor)
    log = simulate_experiment(values, exp, n_bidders=n, n_auctions=reps * size, rng=23, payment_rule=payment_rule,
                              floor=floor, quality=quality)
    chunk = log["auction_id"].to_numpy() // size
    est, se = [], []
    for _, part in log.groupby(chunk, sort=False):
        rev = revenue(estimate_arms(part, exp, cluster="auction").table)
        est.append(rev.loc[["control", "steep", "_mixture"], "estimate"].to_numpy())
        se.append(rev.loc[["control", "steep", "_mixture"], "std_error"].to_numpy())
    ratio = np.mean(se, axis=0) / np.std(est, axis=0, ddof=1)
    assert np.all(np.abs(ratio - 1) < 0.15), ratio


# --- bad inputs ---------------------------------------------------------------------------------------

def small_log(**kw):
    exp = experiment("gsp", floor=0.3)
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=4, n_auctions=300, rng=2, payment_rule="gsp", floor=0.3, **kw)
    return exp, bids


def test_unknown_rule_refused():
    exp, bids = small_log()
    with pytest.raises(InputError, match="unknown payment_rule 'spsa'"):
        estimate_arms(bids, dataclasses.replace(exp, payment_rule="spsa"))
    with pytest.raises(InputError, match="unknown payment_rule"):
        experiment("second_price")


def test_floor_above_every_bid_refused():
    """Shown bids under a floor above them all: the floor is named as the likely fault. Unshown ones: the
    input has nothing eligible, refused where the whole input is combined (a shard alone is not refused,
    tests/estimators/test_below_floor.py)."""
    exp, bids = small_log()
    high = dataclasses.replace(exp, floor=5.0)
    with pytest.raises(InputError, match=r"floor 5.0 lies above every bid \(largest .*\), yet row 0 has position"):
        estimate_arms(bids, high)
    with pytest.raises(InputError, match=r"floor 5.0 lies above every bid of experiment 'quillfen-rules' \(largest"):
        estimate_arms(bids.assign(position=np.nan), high)


def test_sub_floor_bid_with_a_position_refused():
    exp, bids = small_log()
    i = int(np.flatnonzero(bids["position"].isna().to_numpy() & (bids["bid"] < 0.3).to_numpy())[0])
    bids.loc[i, "position"] = 2
    with pytest.raises(InputError, match=rf"row {i} has bid .* below the floor 0.3 but position 2"):
        estimate_arms(bids, exp)


@pytest.mark.parametrize("bad,what", [(0.0, "not positive"), (-1.0, "not positive"), (np.nan, "missing"), (None, "missing")])
def test_bad_quality_names_the_row(bad, what):
    exp, bids = small_log(quality=st.uniform(0.5, 0.5))
    bids["quality"] = bids["quality"].astype(object if bad is None else float)
    bids.loc[7, "quality"] = bad
    with pytest.raises(InputError, match=rf"column 'quality' row 7 is {what}"):
        estimate_arms(bids, exp)


def test_per_arm_floor_refused():
    raw = {"id": "e", "payment_rule": "gsp", "arms": [{"name": "a", "share": 1.0, "position_weights": [1.0], "floor": 0.2}]}
    with pytest.raises(InputError, match="arms with different floors are not modelled"):
        parse_experiments({"experiments": [raw]})


def test_quality_enters_as_effective_bid():
    exp, bids = small_log(quality=st.uniform(0.5, 0.5))
    data = prepare_bids(bids, exp)
    assert data.has_quality
    np.testing.assert_allclose(data.bid, (bids["bid"] * bids["quality"]).to_numpy())
