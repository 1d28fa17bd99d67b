"""Simulated experiments: every arm's estimate within 3 standard errors of its own-equilibrium truth.

Truths are Myerson's formula by quadrature (checked against scipy.integrate.quad in
test_reference_quad.py) or a closed form with its source. Tolerances are the test's own Monte Carlo
error: the standard error each estimate reports (influence function, clustered by auction), whose
calibration the validation study checks (coverage, docs/study/summary.md).

False failures. The file makes M = 29 comparisons of an estimate with its truth (12 in the
three-vs-four-slot test, 15 in the three-arm test, 2 in the strata test), each |estimate - truth|
< Z SE of an asymptotically normal statistic. Šidák's inequality (Šidák 1967, J. Amer. Statist.
Assoc. 62, 626-633) gives P(every |Z_i| < z) >= prod P(|Z_i| < z) for any correlation between
them, so with (2 Phi(z) - 1)^M = 0.99 a fresh seed fails any of them with probability at most
1 %: z = 3.58 (3 SE would allow up to 1 - 0.9973^29 = 7.5 %). Seeds are fixed.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats as st

from counterbid.estimators import (
    EstimatorWarning,
    estimate_arms,
    expected_revenue_per_auction,
    expected_welfare_per_auction,
    parse_experiments,
    simulate_experiment,
)

#: Null comparisons in this file and the Šidák critical value for a 1 % family-wise rate (docstring).
N_COMPARISONS = 29
Z = float(st.norm.isf((1 - 0.99 ** (1 / N_COMPARISONS)) / 2))


def three_vs_four_slots(share):
    doc = {"experiments": [{"id": "s", "control_arm": "three", "arms": [
        {"name": "three", "share": 1 - share, "position_weights": [1.0, 1.0, 1.0]},
        {"name": "four", "share": share, "position_weights": [1.0, 1.0, 1.0, 1.0]}]}]}
    return parse_experiments(doc)["s"]


def two_arm(share):
    doc = {"experiments": [{"id": "s", "control_arm": "one", "arms": [
        {"name": "one", "share": 1 - share, "position_weights": [1.0]},
        {"name": "two", "share": share, "position_weights": [1.0, 1.0]}]}]}
    return parse_experiments(doc)["s"]


@pytest.mark.parametrize("share", [0.5, 0.1, 0.02])
def test_three_vs_four_slots_earn_three_halves(share):
    # Values U[0,1], 7 bidders, k identical slots: revenue k(n-k)/(n+1) = 12/8 = 3/2 per auction
    # for k = 3 and k = 4 (derivation in test_closed_forms.py, Krishna 2010 ch. 3; David & Nagaraja
    # 2003), so the lift is 0.
    exp = three_vs_four_slots(share)
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=7, n_auctions=30_000, rng=11)
    with pytest.warns(EstimatorWarning, match="not identified"):  # identical top three slots: no welfare
        out = estimate_arms(bids, exp).table.set_index(["arm", "metric"])
    for arm in ("three", "four"):
        est, se = out.loc[(arm, "revenue_per_auction"), ["estimate", "std_error"]]
        assert abs(est - 1.5) < Z * se, (arm, est, se)
    lift, lift_se = out.loc[("four", "revenue_lift_vs_control"), ["estimate", "std_error"]]
    assert abs(lift) < Z * lift_se
    # The realized per-arm average is off in the direction theory predicts: the arm that sells more
    # clicks (four slots) is overstated, the one that sells fewer is understated, each by more
    # than Z of its own standard errors.
    r_four, se_four = out.loc[("four", "realized_revenue_per_auction"), ["estimate", "std_error"]]
    r_three, se_three = out.loc[("three", "realized_revenue_per_auction"), ["estimate", "std_error"]]
    assert r_four - 1.5 > Z * se_four and 1.5 - r_three > Z * se_three
    # Sanity identity: estimated and realized mixture revenue agree.
    mix = out.xs("_mixture")
    gap = mix.loc["revenue_per_auction", "estimate"] - mix.loc["realized_revenue_per_auction", "estimate"]
    assert abs(gap) < Z * mix.loc["realized_revenue_per_auction", "std_error"]


@pytest.mark.parametrize("share", [0.5, 0.1, 0.02])
def test_three_arms_lognormal_within_3_se(share):
    doc = {"experiments": [{"id": "m", "control_arm": "control", "arms": [
        {"name": "control", "share": 1 - 2 * share if share < 0.5 else 0.5, "position_weights": [0.31, 0.17, 0.06, 0.02]},
        {"name": "wide", "share": share if share < 0.5 else 0.25, "position_weights": [0.29, 0.22, 0.15, 0.02]},
        {"name": "single", "share": share if share < 0.5 else 0.25, "position_weights": [0.4]}]}]}
    exp = parse_experiments(doc)["m"]
    values = st.lognorm(0.5, scale=0.8)
    bids = simulate_experiment(values, exp, n_bidders=6, n_auctions=40_000, rng=3)
    out = estimate_arms(bids, exp).table.set_index(["arm", "metric"])
    truth_rev = {a.name: expected_revenue_per_auction(values, a.position_weights, 6) for a in exp.arms}
    truth_wel = {a.name: expected_welfare_per_auction(values, a.position_weights, 6) for a in exp.arms}
    for arm in exp.arm_names:
        est, se = out.loc[(arm, "revenue_per_auction"), ["estimate", "std_error"]]
        assert abs(est - truth_rev[arm]) < Z * se, (arm, est, truth_rev[arm], se)
        # Welfare's SE omits the highest bid's spread (heavy tail here): checked to 1 % instead.
        assert out.loc[(arm, "welfare_per_auction"), "estimate"] == pytest.approx(truth_wel[arm], rel=0.01)
    for arm in ("wide", "single"):
        est, se = out.loc[(arm, "revenue_lift_vs_control"), ["estimate", "std_error"]]
        true_lift = truth_rev[arm] / truth_rev["control"] - 1
        assert abs(est - true_lift) < Z * se


def test_varying_number_of_bidders_strata():
    exp = two_arm(0.3)
    values = st.beta(2, 5, scale=3)
    mix_n = {3: 0.5, 5: 0.3, 8: 0.2}
    bids = simulate_experiment(values, exp, n_bidders=mix_n, n_auctions=40_000, rng=5)
    out = estimate_arms(bids, exp)
    assert set(out.strata) == {3, 5, 8}
    est = out.table.set_index(["arm", "metric"])
    for a in exp.arms:
        truth = expected_revenue_per_auction(values, a.position_weights, mix_n)
        e, se = est.loc[(a.name, "revenue_per_auction"), ["estimate", "std_error"]]
        assert abs(e - truth) < Z * se


def test_single_bidder_auctions_are_excluded_and_counted():
    exp = two_arm(0.5)
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders={1: 0.2, 4: 0.8}, n_auctions=5000, rng=2)
    singles = int((bids.groupby("auction_id").size() == 1).sum())
    out = estimate_arms(bids, exp)
    assert singles > 0 and out.n_excluded_auctions == singles
    assert out.n_auctions == bids["auction_id"].nunique() - singles


def test_welfare_not_identified_warns_nan():
    # Two identical top slots in every arm: the mixture's x'(1) = 0, values at the top are not
    # recovered from bids, so welfare is NaN (revenue is still identified).
    doc = {"experiments": [{"id": "w", "control_arm": "a", "arms": [
        {"name": "a", "share": 0.5, "position_weights": [1.0, 1.0]},
        {"name": "b", "share": 0.5, "position_weights": [1.0, 1.0, 0.5]}]}]}
    exp = parse_experiments(doc)["w"]
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=4, n_auctions=3000, rng=1)
    with pytest.warns(EstimatorWarning, match="not identified"):
        out = estimate_arms(bids, exp).table.set_index(["arm", "metric"])
    assert np.isnan(out.loc[("a", "welfare_per_auction"), "estimate"])
    assert np.isfinite(out.loc[("a", "revenue_per_auction"), "estimate"])


def test_confidence_level_and_cluster_options():
    exp = two_arm(0.5)
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=4, n_auctions=4000, rng=9)
    a = estimate_arms(bids, exp, confidence_level=0.90, cluster="auction")
    b = estimate_arms(bids, exp, confidence_level=0.99, cluster="auction")
    with_interval = a.table["std_error"].notna()  # welfare has none (documented in estimate_arms)
    assert with_interval.sum() == len(a.table) - 2 and (a.table.loc[~with_interval, "metric"] == "welfare_per_auction").all()
    assert ((a.table.ci_high - a.table.ci_low) < (b.table.ci_high - b.table.ci_low))[with_interval].all()
    assert a.cluster == "auction"
    c = estimate_arms(bids, exp, cluster="bidder")
    np.testing.assert_allclose(c.table.estimate, a.table.estimate)
    assert c.cluster == "bidder"
