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
    full = estimate_arms(bids, exp, cluster="auction").query("metric == 'revenue_per_auction' and arm != '_mixture'").set_index("arm")
    data = prepare_bids(bids, exp)
    rules = [allocation_rule(a.weights_for(4), 4) for a in exp.arms]
    res = ordstat_revenue(data, rules, mixture_rule(rules, exp.shares))
    np.testing.assert_allclose(res.estimate, full.loc[list(exp.arm_names), "estimate"], rtol=1e-10)
    np.testing.assert_allclose(res.std_error, full.loc[list(exp.arm_names), "std_error"], rtol=1e-8)
    lo, hi = res.confidence_interval()
    np.testing.assert_allclose(lo, full.loc[list(exp.arm_names), "ci_low"], rtol=1e-8)


def test_bias_within_two_monte_carlo_standard_errors():
    out = size_study(distributions=("uniform", "lognormal"), bidders=(3,), sizes=(2000,), reps=200, seed=1,
                     two_step=False)
    assert len(out) == 4  # 2 distributions x 2 arms
    assert (out["failed_runs"] == 0).all()
    assert (np.abs(out["bias"]) <= 2 * out["bias_se"]).all(), out[["distribution", "arm", "bias", "bias_se"]]


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
