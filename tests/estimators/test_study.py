"""Monte Carlo study functions: fast paths agree with the public ones; bias, coverage, RMSE claims.

Truth is Myerson's formula by quadrature (Myerson 1981, Math. Oper. Res. 6(1), Lemma 3); the
two-sample Kolmogorov-Smirnov test is scipy.stats.ks_2samp; coverage intervals are Clopper-Pearson
(scipy.stats.binomtest).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scipy.stats as st

from counterbid.estimators import InputError, allocation_rule, estimate_arms, mixture_rule, prepare_bids, simulate_experiment
from counterbid.estimators.study import (
    VALUE_DISTRIBUTIONS,
    coverage_table,
    ordstat_revenue,
    share_study,
    simulate_prepared,
    size_study,
    study_experiment,
)


def test_fast_simulator_matches_simulate_experiment():
    exp = study_experiment(0.2)
    rng = np.random.default_rng(0)
    fast = simulate_prepared("lognormal", exp, n_bidders=5, n_auctions=4000, rng=rng)
    slow = simulate_experiment(VALUE_DISTRIBUTIONS["lognormal"], exp, n_bidders=5, n_auctions=4000, rng=1)
    assert st.ks_2samp(fast.bid, slow["bid"].to_numpy()).pvalue > 1e-3
    # Arm frequencies: the treated arm in about 20 % of auctions (binomial test).
    treated = np.count_nonzero(fast.arm == 1) // 5
    assert st.binomtest(treated, 4000, 0.2).pvalue > 1e-3
    # Positions are the ranks by bid inside each auction; unshown positions are 0.
    top = fast.position.reshape(-1, 5)
    bids = fast.bid.reshape(-1, 5)
    np.testing.assert_array_equal(np.argmax(bids, axis=1), np.argmin(np.where(top == 0, 99, top), axis=1))
    assert set(np.unique(fast.position)) <= {0, 1, 2, 3, 4}


def test_fast_estimator_equals_estimate_arms():
    exp = study_experiment(0.1)
    bids = simulate_experiment(VALUE_DISTRIBUTIONS["beta"], exp, n_bidders=4, n_auctions=3000, rng=4)
    full = estimate_arms(bids, exp, cluster="auction").table.query("metric == 'revenue_per_auction' and arm != '_mixture'").set_index("arm")
    data = prepare_bids(bids, exp)
    rules = [allocation_rule(a.weights_for(4), 4) for a in exp.arms]
    res = ordstat_revenue(data, rules, mixture_rule(rules, exp.shares))
    np.testing.assert_allclose(res.estimate, full.loc[list(exp.arm_names), "estimate"], rtol=1e-10)
    np.testing.assert_allclose(res.std_error, full.loc[list(exp.arm_names), "std_error"], rtol=1e-8)
    lo, hi = res.confidence_interval()
    np.testing.assert_allclose(lo, full.loc[list(exp.arm_names), "ci_low"], rtol=1e-8)


def test_bias_within_monte_carlo_error_at_a_one_percent_family_rate():
    # Four cells (2 distributions x 2 arms), each bias / bias_se ~ N(0, 1) over 200 replicates. At
    # 2 SE a fresh seed would fail one of the four with probability up to 1 - 0.954^4 = 17 %.
    # Šidák's inequality (Šidák 1967, J. Amer. Statist. Assoc. 62, 626-633) bounds that by
    # 1 - (2 Phi(z) - 1)^4 for any correlation between the cells; z = 3.02 makes it 1 %.
    z = float(st.norm.isf((1 - 0.99 ** (1 / 4)) / 2))
    assert 3.0 < z < 3.05
    out = size_study(distributions=("uniform", "lognormal"), bidders=(3,), sizes=(2000,), reps=200, seed=1,
                     two_step=False)
    assert len(out) == 4  # 2 distributions x 2 arms
    assert (out["failed_runs"] == 0).all()
    assert (np.abs(out["bias"]) <= z * out["bias_se"]).all(), out[["distribution", "arm", "bias", "bias_se"]]
    # The comparison can fail: against a truth 10 % lower every cell would.
    assert not (np.abs(out["bias"] + 0.1 * out["truth"]) <= z * out["bias_se"]).any()


@pytest.mark.slow
def test_coverage_of_200_runs_at_three_and_five_bidders():
    out = size_study(distributions=("lognormal",), bidders=(3, 5), sizes=(3000,), reps=200, seed=2, two_step=False)
    assert (out["coverage_runs"] == 200).all()
    assert out["coverage"].between(0.90, 0.99).all(), out[["n_bidders", "arm", "coverage"]]
    # The standard error tracks the Monte Carlo spread (ratio within 15 %).
    assert (np.abs(out["mean_se"] / out["sd"] - 1) < 0.15).all()
    cov = coverage_table(out)
    assert ((cov["coverage_low"] <= cov["coverage"]) & (cov["coverage"] <= cov["coverage_high"])).all()


def test_rmse_sqrt_n_is_flat_in_n():
    out = size_study(distributions=("beta",), bidders=(5,), sizes=(500, 5000), reps=60, seed=3, two_step=False)
    t = out[out["arm"] == "treated"].set_index("n_bids")["rmse_sqrt_n"]
    assert 0.7 < t[5000] / t[500] < 1.4


def test_share_study_estimator_beats_informed_ab_at_small_share_and_realized_average_is_biased():
    out = share_study(distributions=("uniform",), bidders=(3,), shares=(0.5, 0.02), n_auctions=5000, reps=40, seed=4)
    r = out.set_index(["share", "method"])
    # With 2 % of traffic the informed-bidder test sees 100 auctions; the estimator uses all 5000 auctions' bids.
    assert r.loc[(0.02, "ordstat"), "rmse"] < 0.5 * r.loc[(0.02, "informed_ab"), "rmse"]
    assert r.loc[(0.02, "informed_ab"), "rmse_vs_informed"] == pytest.approx(1.0)
    # realized per-arm average: bidders answered the mixture, so its bias dwarfs its Monte Carlo error.
    for s in (0.5, 0.02):
        assert abs(r.loc[(s, "realized_average"), "bias"]) > 5 * r.loc[(s, "realized_average"), "bias_se"]
        assert abs(r.loc[(s, "ordstat"), "bias"]) < 3 * r.loc[(s, "ordstat"), "bias_se"]
    assert r.loc[(0.02, "informed_ab"), "auctions_used"] == 100
    small = size_study(distributions=("uniform",), bidders=(3,), sizes=(300,), reps=5, seed=0, two_step=False)
    cov = coverage_table(small, out)
    assert set(cov["design"]) == {"size", "share"}
    assert set(cov.loc[cov["design"] == "share", "method"]) == {"ordstat", "informed_ab"}


def test_two_step_rows_and_deterministic_seed():
    a = size_study(distributions=("lognormal",), bidders=(2,), sizes=(200,), reps=5, seed=9)
    b = size_study(distributions=("lognormal",), bidders=(2,), sizes=(200,), reps=5, seed=9)
    pd.testing.assert_frame_equal(a, b)
    assert set(a["method"]) == {"ordstat", "two_step"}
    assert a.loc[a["method"] == "two_step", "coverage"].isna().all()


@pytest.mark.parametrize("kwargs, match", [
    ({"distributions": ("pareto",)}, "distributions"),
    ({"bidders": (1,)}, "bidders"),
    ({"sizes": (0,)}, "sizes"),
    ({"reps": 1}, "reps"),
])
def test_bad_study_arguments(kwargs, match):
    with pytest.raises(InputError, match=match):
        size_study(**kwargs)


def test_bad_share():
    with pytest.raises(InputError, match="share"):
        study_experiment(1.5)
    with pytest.raises(InputError, match="shares"):
        share_study(shares=(0.0,))


# --------------------------------------------------------------------------------------------
# Payment rules and a floor in the fast path.

#: Floor per click for the rule tests (log-normal values: q* = F(0.6) ~ 0.28, a third of the bids below it).
STUDY_FLOOR = 0.6


@pytest.mark.parametrize("payment_rule", ["gsp", "vcg"])
@pytest.mark.parametrize("floor", [None, STUDY_FLOOR])
def test_fast_estimator_equals_estimate_arms_for_rule_and_floor(payment_rule, floor):
    # Same prepared bids into both: simulate_prepared's output is a PreparedBids that estimate_arms takes as it is.
    exp = study_experiment(0.3, payment_rule=payment_rule, floor=floor)
    data = simulate_prepared("lognormal", exp, n_bidders=4, n_auctions=2500, rng=np.random.default_rng(11))
    if floor is not None:
        below = np.count_nonzero(data.bid < floor) / data.bid.size
        assert 0.2 < below < 0.4  # the floor is active: q* = F(0.6) ~ 0.28 under the log-normal values
    result = estimate_arms(data, exp, cluster="auction")
    full = result.table.query("metric == 'revenue_per_auction' and arm != '_mixture'").set_index("arm")
    assert result.payment_rule == payment_rule
    rules = [allocation_rule(a.weights_for(4), 4) for a in exp.arms]
    res = ordstat_revenue(data, rules, mixture_rule(rules, exp.shares), payment_rule=payment_rule, floor=floor)
    np.testing.assert_allclose(res.estimate, full.loc[list(exp.arm_names), "estimate"], rtol=1e-10)
    np.testing.assert_allclose(res.std_error, full.loc[list(exp.arm_names), "std_error"], rtol=1e-8)
    if floor is not None:
        # The comparison can fail: without the floor step (no clamping, boundary or q* term) the
        # estimates move far beyond the 1e-10 tolerance and the standard errors by over 5 %.
        plain = ordstat_revenue(data, rules, mixture_rule(rules, exp.shares), payment_rule=payment_rule)
        assert np.all(np.abs(plain.estimate / res.estimate - 1) > 1e-6)
        assert np.all(np.abs(plain.std_error / res.std_error - 1) > 0.05)


def test_fast_simulator_matches_simulate_experiment_for_gsp_with_floor():
    exp = study_experiment(0.2, payment_rule="gsp", floor=STUDY_FLOOR)
    fast = simulate_prepared("lognormal", exp, n_bidders=5, n_auctions=3000, rng=np.random.default_rng(0))
    slow = simulate_experiment(VALUE_DISTRIBUTIONS["lognormal"], exp, n_bidders=5, n_auctions=3000, rng=1)
    assert st.ks_2samp(fast.bid, slow["bid"].to_numpy()).pvalue > 1e-3
    # Log convention: sub-floor bids are unshown (position 0 here, null in the frame), and the
    # shares of unshown bids agree (chi-square on the 2 x 2 table).
    assert np.all(fast.position[fast.bid < STUDY_FLOOR] == 0)
    assert np.all(fast.bid[fast.position > 0] >= STUDY_FLOOR)
    unshown_slow = int(slow["position"].isna().sum())
    table = [[int(np.count_nonzero(fast.position == 0)), fast.bid.size - int(np.count_nonzero(fast.position == 0))],
             [unshown_slow, len(slow) - unshown_slow]]
    assert st.chi2_contingency(table).pvalue > 1e-3
    # Shown bids are ranked by bid: positions 1..4 of the top eligible bids.
    pos = fast.position.reshape(-1, 5)
    bids = fast.bid.reshape(-1, 5)
    shown_top = pos.max(axis=1) > 0
    np.testing.assert_array_equal(np.argmax(bids, axis=1)[shown_top],
                                  np.argmin(np.where(pos == 0, 99, pos), axis=1)[shown_top])


def test_vcg_bids_are_values_and_two_step_skipped():
    exp = study_experiment(0.5, payment_rule="vcg")
    data = simulate_prepared("uniform", exp, n_bidders=3, n_auctions=2000, rng=np.random.default_rng(3))
    assert st.kstest(data.bid, VALUE_DISTRIBUTIONS["uniform"].cdf).pvalue > 1e-3
    out = size_study(distributions=("uniform",), bidders=(3,), sizes=(300,), reps=4, seed=0,
                     payment_rule="vcg", floor=0.5)
    assert set(out["method"]) == {"ordstat"}  # the two-step baseline is pay-your-bid without a floor


def test_gsp_floor_study_bias_within_monte_carlo_error():
    # Truth: Myerson's formula with the floor (expected_revenue_per_auction(..., floor=)).
    out = size_study(distributions=("lognormal",), bidders=(3,), sizes=(3000,), reps=60, seed=5,
                     payment_rule="gsp", floor=STUDY_FLOOR)
    assert (out["failed_runs"] == 0).all()
    # 3 bias_se: two arms at 2 sigma would fail jointly up to 1 - 0.954^2 = 9 % of the time; at 3 sigma
    # the Šidák bound is 1 - 0.9973^2 = 0.5 %.
    assert (np.abs(out["bias"]) <= 3 * out["bias_se"]).all(), out[["arm", "bias", "bias_se"]]
    share = share_study(distributions=("lognormal",), bidders=(3,), shares=(0.05,), n_auctions=2000, reps=8, seed=5,
                        payment_rule="gsp", floor=STUDY_FLOOR)
    assert set(share["method"]) == {"ordstat", "informed_ab", "realized_average"}
    assert share["truth"].nunique() == 1


@pytest.mark.parametrize("kwargs, match", [
    ({"payment_rule": "second_price"}, "payment_rule"),
    ({"floor": -1.0}, "floor"),
    ({"floor": 2.5, "distributions": ("uniform",)}, "above every uniform value"),
])
def test_bad_rule_or_floor(kwargs, match):
    with pytest.raises(InputError, match=match):
        size_study(sizes=(100,), reps=2, **kwargs)
