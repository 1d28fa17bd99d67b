"""Two-step kernel baseline (Guerre, Perrigne & Vuong 2000, Econometrica 68(3), 525-574).

Reference values: closed forms for U[0, 1] values (Krishna, Auction Theory, 2nd ed., 2010: ch. 2,
one slot and n bidders bid (n-1)/n of the value; ch. 3, k identical slots earn k(n-k)/(n+1)), and
Myerson's formula by quadrature (``expected_revenue_per_auction``).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scipy.stats as st

from counterbid.estimators import (
    InputError,
    allocation_rule,
    estimate_arms,
    expected_revenue_per_auction,
    parse_experiments,
    simulate_experiment,
)
from counterbid.estimators.two_step import pseudo_values, two_step_revenue

CONTROL = [0.31, 0.17, 0.06, 0.02]
TREATED = [0.36, 0.12, 0.05, 0.02]


def experiment(arms):
    doc = {"experiments": [{"id": "ts", "control_arm": arms[0][0],
                            "arms": [{"name": a, "share": s, "position_weights": w} for a, s, w in arms]}]}
    return parse_experiments(doc)["ts"]


def test_pseudo_values_recover_values_four_bidders_uniform():
    # Four bidders, U[0, 1] values, one slot: b(v) = 3/4 v (Krishna ch. 2), so the bid at quantile
    # q is 3/4 q and the value there is q. x(q) = q^3, so the inversion v = b + x(G)/(g x'(G))
    # = b + G/(3 g); on the exact bid grid (no random draws) the pseudo-values must be close to
    # their quantile away from the (trimmed) boundaries. On a uniform bid density the kernel is
    # exact inside; what is left is the method's discretization (2048-bin histogram, 1025-point
    # grid, linear interpolation): measured max error in [0.2, 0.8] 7.4e-7, 5.6e-7, 2.9e-7, 6.3e-7
    # at N = 1e4, 2e4, 4e4, 1e5. The bound 5e-6 is about ten times that, and a hundred times below
    # what G off by one histogram bin would cost (1/2048 in quantile, 1.2e-4 in value).
    big_n = 20_000
    q = (np.arange(big_n) + 0.5) / big_n
    pv = pseudo_values(0.75 * q, allocation_rule([1.0], 4))
    inner = (pv.quantile > 0.2) & (pv.quantile < 0.8)
    assert np.count_nonzero(inner) > 0.55 * big_n
    np.testing.assert_allclose(pv.value[inner], pv.quantile[inner], atol=5e-6)
    assert 0 < pv.n_trimmed < 0.2 * big_n


def test_trimming_grows_with_bandwidths_and_zero_keeps_every_bid():
    b = np.sort(np.random.default_rng(3).random(5000))
    rule = allocation_rule([1.0], 3)
    counts = [pseudo_values(b, rule, trim_bandwidths=t).n_trimmed for t in (0.0, 1.0, 2.0)]
    assert counts[0] == 0
    assert counts[0] < counts[1] < counts[2]


def test_revenue_equivalence_three_vs_four_slots():
    # Seven bidders, U[0, 1]: three and four identical slots both earn k(n-k)/(n+1) = 12/8 = 3/2
    # per auction (Krishna ch. 3; derivation in test_closed_forms.py). The two-step has no standard
    # error of its own; over seeds 11-16 of this design it gave 1.4502 +- 0.0003 (three slots) and
    # 1.4917 +- 0.0018 (four slots), mean +- sd of the 6 runs: a boundary-trimming bias of about
    # -0.050 and -0.008 (values with a hard upper bound, DEVELOPERS.md) and little Monte Carlo
    # noise. The bounds are those biases plus 20 sd either way.
    exp = experiment([("three", 0.5, [1.0] * 3), ("four", 0.5, [1.0] * 4)])
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=7, n_auctions=30_000, rng=11)
    rev = two_step_revenue(bids, exp).set_index("arm")["estimate"]
    assert rev["three"] == pytest.approx(1.5 - 0.050, abs=20 * 0.0003)
    assert rev["four"] == pytest.approx(1.5 - 0.008, abs=20 * 0.0018)
    # The order-statistic estimator on the same bids has no such bias (within 4 of its own SE).
    est = estimate_arms(bids, exp).table.query("metric == 'revenue_per_auction'").set_index("arm")
    assert (np.abs(est.loc[["three", "four"], "estimate"] - 1.5) < 4 * est.loc[["three", "four"], "std_error"]).all()


@pytest.mark.parametrize("values", [st.lognorm(0.5, scale=0.8), st.beta(2, 5, scale=3)], ids=["lognormal", "beta"])
def test_agrees_with_estimator_and_truth_at_large_n(values):
    # 100 000 bids, five bidders: the kernel step's smoothing and trimming biases are small here;
    # both methods within 1 % of Myerson's formula (by quadrature) and of each other.
    exp = experiment([("control", 0.5, CONTROL), ("treated", 0.5, TREATED)])
    bids = simulate_experiment(values, exp, n_bidders=5, n_auctions=20_000, rng=5)
    two = two_step_revenue(bids, exp).set_index("arm")["estimate"]
    est = estimate_arms(bids, exp).table.query("metric == 'revenue_per_auction'").set_index("arm")["estimate"]
    for arm, w in (("control", CONTROL), ("treated", TREATED)):
        truth = expected_revenue_per_auction(values, w, 5)
        assert two[arm] == pytest.approx(truth, rel=0.01)
        assert two[arm] == pytest.approx(est[arm], rel=0.01)


def test_several_strata_weighted_by_auctions():
    exp = experiment([("control", 0.5, CONTROL), ("treated", 0.5, TREATED)])
    values = st.lognorm(0.5, scale=0.8)
    bids = simulate_experiment(values, exp, n_bidders={4: 0.5, 6: 0.5}, n_auctions=30_000, rng=2)
    rev = two_step_revenue(bids, exp).set_index("arm")["estimate"]
    truth = expected_revenue_per_auction(values, TREATED, {4: 0.5, 6: 0.5})
    assert rev["treated"] == pytest.approx(truth, rel=0.02)


def test_too_few_bids_give_nan_not_a_crash():
    exp = experiment([("control", 0.5, CONTROL), ("treated", 0.5, TREATED)])
    bids = pd.DataFrame({"auction_id": [1, 1], "bidder_id": [1, 2], "arm": ["control"] * 2,
                         "bid": [0.3, 0.5], "position": [2, 1]})
    out = two_step_revenue(bids, exp)
    assert out["estimate"].isna().all()
    assert list(out.columns) == ["arm", "metric", "estimate", "n_auctions", "n_bids", "n_trimmed"]


@pytest.mark.parametrize("kwargs, match", [
    ({"trim_bandwidths": -1.0}, "trim_bandwidths"),
    ({"bw_method": "widest"}, "bw_method"),
])
def test_bad_options(kwargs, match):
    exp = experiment([("control", 0.5, CONTROL), ("treated", 0.5, TREATED)])
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=4, n_auctions=200, rng=1)
    with pytest.raises(InputError, match=match):
        two_step_revenue(bids, exp, **kwargs)


def test_bad_bids_are_reported_by_the_data_contract():
    exp = experiment([("control", 0.5, CONTROL), ("treated", 0.5, TREATED)])
    bids = pd.DataFrame({"auction_id": [1, 1], "bidder_id": [1, 2], "arm": ["control"] * 2,
                         "bid": [0.3, -1.0], "position": [2, 1]})
    with pytest.raises(InputError, match="row 1 is negative"):
        two_step_revenue(bids, exp, source="pilot.parquet")
