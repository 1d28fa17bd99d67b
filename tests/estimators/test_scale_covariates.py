"""Scale covariates: values ``exp(gamma . x_j) v~``, estimated on homogenised bids and scaled back.

References checked against (docs/method.md, "Scale covariates"):
* revenue of the unscaled values by quadrature of Myerson's formula in quantile form,
  ``n int_0^1 (1 - q) F^-1(q) y'(q) dq`` (Myerson 1981, Lemma 3; Krishna 2010, ch. 5), with
  ``scipy.integrate.quad`` on scipy.stats' quantile function and the position weights' Bernstein
  polynomial built here with numpy;
* times the auctions' own mean scale ``mean_j exp(gamma . x_j)`` (gamma known to the simulation):
  with every value of auction ``j`` scaled by ``c_j`` and the equilibrium homogeneous of degree
  one (no floor), each auction's revenue is ``c_j`` times the unscaled one, so revenue per auction
  at these auctions' scales is the product (the estimand conditions on the covariates, as on the
  strata's auction counts; docs/method.md).

Monte Carlo tolerances come from each test's own replicates: the sample sd over ``R`` replicates
has relative sd ``1 / sqrt(2 (R - 1))`` (normal theory; Kendall & Stuart), coverage over ``R``
replicates binomial sd ``sqrt(p (1 - p) / R)``; checks allow 3 of either.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.stats as st
from numpy.polynomial import Polynomial
from scipy import integrate
from scipy.special import comb

from counterbid.estimators import (
    EstimatorWarning,
    InputError,
    PreparedBids,
    allocation_rule,
    equilibrium_bid_function,
    estimate_arms,
    mixture_rule,
    parse_experiments,
    simulate_experiment,
)
from counterbid.estimators.scale_covariates import fit_scale, homogenized_bids

VALUES = st.lognorm(0.5, scale=0.8)
WEIGHTS = {"anchor": [0.31, 0.17, 0.06, 0.02], "tilted": [0.29, 0.22, 0.15, 0.02]}
SIGNAL = st.norm(0.0, 0.6)  # the observed auction-level covariate
# Strong enough that gamma^'s own spread is about 30 % of the estimate's variance: a standard error
# without it would fail the SE / Monte Carlo check below.
GAMMA = 1.0
Z95 = float(st.norm.ppf(0.975))


def experiment(covariates=("footfall",), *, payment_rule="first_price", floor=None, share=0.8):
    raw = {"id": "lanes", "control_arm": "anchor", "payment_rule": payment_rule,
           "arms": [{"name": "anchor", "share": share, "position_weights": WEIGHTS["anchor"]},
                    {"name": "tilted", "share": round(1 - share, 10), "position_weights": WEIGHTS["tilted"]}]}
    if covariates:
        raw["scale_covariates"] = list(covariates)
    if floor is not None:
        raw["floor"] = floor
    return parse_experiments({"experiments": [raw]})["lanes"]


def quad_revenue(values, weights, n):
    """Myerson's per-auction revenue of position weights, by quad (independent of the project's code)."""
    q = Polynomial([0, 1])
    y = sum((w * comb(n - 1, k - 1) * (1 - q) ** (k - 1) * q ** (n - k) for k, w in enumerate(weights[:n], 1)),
            Polynomial([0.0]))
    dy = y.deriv()
    val, _ = integrate.quad(lambda u: (1 - u) * values.ppf(u) * dy(u), 0, 1, limit=200, epsabs=1e-12)
    return n * val


def truth(arm, auction_x, n=5):
    """Revenue per auction of ``arm`` at the auctions' own scales ``exp(GAMMA x_j)``."""
    return float(np.exp(GAMMA * np.asarray(auction_x)).mean()) * quad_revenue(VALUES, WEIGHTS[arm], n)


def revenue(out):
    return out.rows("revenue_per_auction")


def quiet_estimate(bids, exp, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", EstimatorWarning)  # welfare's missing interval
        return estimate_arms(bids, exp, **kw)


# ---------------------------------------------------------------------------------------------
# Against the quadrature reference, and the pooled estimate on the same data


@pytest.mark.parametrize("rule", ["first_price", "gsp"])
def test_revenue_with_a_covariate_matches_quadrature_and_the_pooled_estimate_does_not(rule):
    bids = simulate_experiment(VALUES, experiment(None), n_bidders=5, n_auctions=30_000, rng=11, payment_rule=rule,
                               scale_covariates={"footfall": (GAMMA, SIGNAL)})
    declared = quiet_estimate(bids, experiment(payment_rule=rule)).table.set_index(["arm", "metric"])
    pooled = quiet_estimate(bids, experiment(None, payment_rule=rule)).table.set_index(["arm", "metric"])
    x = bids.groupby("auction_id")["footfall"].first()
    want = {(arm, "revenue_per_auction"): truth(arm, x) for arm in WEIGHTS}
    want["tilted", "revenue_lift_vs_control"] = (quad_revenue(VALUES, WEIGHTS["tilted"], 5)
                                                 / quad_revenue(VALUES, WEIGHTS["anchor"], 5) - 1)
    worst = 0.0
    for key, t in want.items():
        est, se = declared.loc[key, ["estimate", "std_error"]]
        # 4 SE: the SE itself is checked against the Monte Carlo spread below.
        assert abs(est - t) <= 4 * se, (rule, key, est, t, se)
        z = (pooled.loc[key, "estimate"] - t) / pooled.loc[key, "std_error"]
        worst = max(worst, abs(z))
    # The same log pooled (no covariate declared) is far off -- the reason for the feature. Measured
    # on this seed: first price control +26 % (z 84), small arm +6 %, lift -0.094 for 0.077 (z -231);
    # gsp control -3.5 %, small arm -12 %, lift -0.023 (z -207). Declared: every |z| < 1.3.
    lift = ("tilted", "revenue_lift_vs_control")
    assert abs(pooled.loc[lift, "estimate"] - want[lift]) > 0.02 and worst > 20, (rule, worst)


def test_fit_recovers_gamma_and_the_estimate_ignores_shifts_and_constant_covariates():
    bids = simulate_experiment(VALUES, experiment(None), n_bidders=4, n_auctions=5_000, rng=3,
                               scale_covariates={"footfall": (GAMMA, SIGNAL), "weather": (-0.3, st.uniform(0, 1))})
    fit = fit_scale(bids["bid"].to_numpy(), bids[["footfall", "weather"]].to_numpy())
    # 20 000 bids, residual sd about 0.5: SE of the slopes 0.5 / sqrt(20 000 var(x)) = 0.006 and 0.012.
    assert fit.gamma == pytest.approx([GAMMA, -0.3], abs=0.05)
    base = revenue(quiet_estimate(bids, experiment(("footfall", "weather"))))
    moved = bids.assign(footfall=bids["footfall"] * 3.0 + 7.0, weather=bids["weather"] - 100.0)
    again = revenue(quiet_estimate(moved, experiment(("footfall", "weather"))))
    np.testing.assert_allclose(again[["estimate", "std_error"]], base[["estimate", "std_error"]], rtol=1e-9)
    flat = bids.assign(footfall=2.5)  # no spread: no slope, m = 1, the plain estimate
    plain = revenue(quiet_estimate(bids.drop(columns=["footfall", "weather"]), experiment(None)))
    same = revenue(quiet_estimate(flat, experiment(("footfall",))))
    np.testing.assert_allclose(same[["estimate", "std_error"]], plain[["estimate", "std_error"]], rtol=1e-9)


def test_estimates_scale_exactly_with_the_bid_unit():
    # Bids beyond 2**200 are estimated in a power-of-two unit (docs/method.md); the homogenised bids too.
    bids = simulate_experiment(VALUES, experiment(None), n_bidders=3, n_auctions=2_000, rng=4,
                               scale_covariates={"footfall": (GAMMA, SIGNAL)})
    base = revenue(quiet_estimate(bids, experiment()))
    huge = revenue(quiet_estimate(bids.assign(bid=bids["bid"] * 2.0**250), experiment()))
    np.testing.assert_allclose(huge[["estimate", "std_error"]].to_numpy() / 2.0**250,
                               base[["estimate", "std_error"]].to_numpy(), rtol=1e-12)


def test_homogenised_bids_take_each_stratum_its_own_fit():
    rng = np.random.default_rng(5)
    x = rng.normal(size=(400, 1)).repeat(2, axis=0)
    stratum = np.repeat([2, 3], 400)
    bid = np.exp(np.where(stratum == 2, 0.5, -1.0) * x[:, 0]) * rng.uniform(0.5, 1.5, size=800)
    out = homogenized_bids(bid, x, stratum)
    for key in (2, 3):
        rows = stratum == key
        np.testing.assert_array_equal(out[rows], fit_scale(bid[rows], x[rows]).homogenized)


# ---------------------------------------------------------------------------------------------
# Standard errors: SE / Monte Carlo spread and coverage, auction and bidder clustering


def persistent_bids(exp, rng, *, n=5, auctions=2_000, pool=None) -> PreparedBids:
    """Equilibrium bids of ``auctions`` auctions scaled by ``exp(GAMMA x_j)``.

    ``pool=None``: every bid a new bidder. Else ``pool`` bidders, each with one value quantile
    kept across every auction it enters (n distinct bidders per auction).
    """
    rules = [allocation_rule(a.weights_for(n), n) for a in exp.arms]
    bid_of_q = equilibrium_bid_function(VALUES, mixture_rule(rules, exp.shares),
                                        payment_rule=exp.payment_rule)
    if pool is None:
        bidder = np.arange(auctions * n).reshape(auctions, n)
        quantile = rng.random((auctions, n))
    else:
        bidder = (rng.integers(0, pool, size=(auctions, 1)) + np.arange(n)) % pool
        quantile = rng.random(pool)[bidder]
    x = SIGNAL.rvs(size=auctions, random_state=rng)
    bid = bid_of_q(quantile) * np.exp(GAMMA * x)[:, None]  # homogeneous of degree one (no floor)
    position = np.argsort(np.argsort(-bid, axis=1), axis=1) + 1
    arm = rng.choice(2, size=auctions, p=exp.shares)
    return PreparedBids(bid=bid.ravel(), auction=np.repeat(np.arange(auctions), n), bidder=bidder.ravel(),
                        arm=np.repeat(arm, n).astype(np.int8), position=position.ravel().astype(np.int16),
                        n_bidders=np.full(auctions * n, n, dtype=np.uint8), n_auctions=auctions,
                        n_excluded_auctions=0, n_excluded_bids=0, covariates=np.repeat(x, n)[:, None])


@pytest.mark.slow
@pytest.mark.parametrize("cluster,pool", [("auction", None), ("bidder", 1_500)])
def test_standard_errors_and_coverage_with_a_covariate(cluster, pool):
    reps = 300
    exp = experiment()
    rng = np.random.default_rng(2027 if pool is None else 2028)
    keys = {"anchor": ("anchor", "revenue_per_auction"), "tilted": ("tilted", "revenue_per_auction"),
            "lift": ("tilted", "revenue_lift_vs_control")}
    lift = quad_revenue(VALUES, WEIGHTS["tilted"], 5) / quad_revenue(VALUES, WEIGHTS["anchor"], 5) - 1
    est = {k: np.empty(reps) for k in keys}
    se = {k: np.empty(reps) for k in keys}
    for r in range(reps):
        data = persistent_bids(exp, rng, pool=pool)
        table = quiet_estimate(data, exp, cluster=cluster).table.set_index(["arm", "metric"])
        x = data.covariates[::5, 0]
        want = {"anchor": truth("anchor", x), "tilted": truth("tilted", x), "lift": lift}
        for k, key in keys.items():
            est[k][r], se[k][r] = table.loc[key, ["estimate", "std_error"]]
            est[k][r] -= want[k]  # the error: the truth moves with the replicate's covariates
    rel = 3 / math.sqrt(2 * (reps - 1))  # 0.12
    sd = math.sqrt(0.95 * 0.05 / reps)  # 0.0126
    for k in keys:
        ratio = se[k].mean() / est[k].std(ddof=1)
        coverage = float(np.mean(np.abs(est[k]) <= Z95 * se[k]))
        print(f"{cluster} {k}: SE / MC sd {ratio:.3f}, coverage {coverage:.3f}")
        assert 1 - rel <= ratio <= 1 + rel, (cluster, k, ratio)
        assert 0.95 - 3 * sd <= coverage <= 0.95 + 3 * sd, (cluster, k, coverage)


def test_without_the_fit_s_influence_the_standard_error_is_too_small():
    # The delta-method term matters: m times the homogenised estimate's own influence misses gamma^'s
    # spread. Its share of the variance is (m1/m)^2 var(e) / var(x) against the kernel's own
    # (gamma sd(x) = 0.6 here): about 30 %, so the full SE exceeds m SE~ by about 15 %. One large draw
    # (100 000 bids: the SEs' own relative noise is below 1 %).
    exp = experiment()
    data = persistent_bids(exp, np.random.default_rng(9), auctions=20_000)
    full = revenue(quiet_estimate(data, exp, cluster="auction"))
    fit = fit_scale(data.bid, data.covariates)
    homogenised = PreparedBids(**{**data.__dict__, "bid": fit.homogenized, "covariates": None})
    bare = revenue(quiet_estimate(homogenised, experiment(None), cluster="auction"))
    np.testing.assert_allclose(full["estimate"], fit.scale_mean * bare["estimate"], rtol=1e-12)
    ratio = (full["std_error"] / (fit.scale_mean * bare["std_error"])).to_numpy()
    assert (ratio[:2] > 1.08).all(), ratio  # the arms; the mixture likewise


# ---------------------------------------------------------------------------------------------
# Bad input: one line naming the column and the row or auction


def frame(**columns):
    base = {"auction_id": [1, 1, 2, 2], "bidder_id": [1, 2, 3, 4], "arm": ["anchor", "anchor", "tilted", "tilted"],
            "bid": [1.0, 0.5, 0.8, 0.3], "position": [1, 2, 1, 2], "footfall": [0.1, 0.1, 0.4, 0.4]}
    base.update(columns)
    return pd.DataFrame(base)


@pytest.mark.parametrize("columns,message", [
    ({"footfall": [0.1, 0.1, 0.4, 0.5]}, "auction 2 has two values of scale covariate column 'footfall' (0.4 at row 2, "
                                         "0.5 at row 3)"),
    ({"footfall": [0.1, 0.1, None, None]}, "scale covariate column 'footfall' row 2 is null or NaN"),
    ({"footfall": [0.1, 0.1, np.inf, np.inf]}, "scale covariate column 'footfall' row 2 is infinite"),
    ({"footfall": ["a", "a", "b", "b"]}, "scale covariate column 'footfall' must be numeric (dtype str); row 0 holds 'a'"),
    ({"footfall": [True, True, False, False]}, "scale covariate column 'footfall' must be numeric, not boolean"),
    ({"bid": [1.0, 0.0, 0.8, 0.3]}, "column 'bid' row 1 is 0.0; with scale_covariates every (effective) bid must be > 0"),
])
def test_bad_covariate_columns_are_refused_in_one_line(columns, message):
    with pytest.raises(InputError) as info:
        estimate_arms(frame(**columns), experiment(), source="day.parquet")
    text = str(info.value)
    assert "\n" not in text and text.startswith("day.parquet: ") and message in text, text


def test_a_missing_covariate_column_is_named():
    with pytest.raises(InputError, match="scale covariate column 'footfall' of experiment 'lanes' is missing"):
        estimate_arms(frame().drop(columns=["footfall"]), experiment())


@pytest.mark.parametrize("raw,message", [
    ({"scale_covariates": "footfall"}, "'scale_covariates' must be a list"),
    ({"scale_covariates": ["bid"]}, "scale_covariates[0] 'bid' is a column of the bids data contract"),
    ({"scale_covariates": ["a", "a"]}, "scale_covariates[1] 'a' is listed twice"),
    ({"scale_covariates": ["a b"]}, "scale_covariates[0] must be a column name"),
    ({"scale_covariates": ["footfall"], "floor": 0.1}, "a floor (0.1) with scale_covariates is not modelled"),
])
def test_spec_key_is_validated(raw, message):
    doc = {"id": "lanes", "arms": [{"name": "anchor", "share": 1.0, "position_weights": [1.0]}], **raw}
    with pytest.raises(InputError) as info:
        parse_experiments({"experiments": [doc]}, source="plan.yaml")
    assert message in str(info.value) and "\n" not in str(info.value)


# ---------------------------------------------------------------------------------------------
# The dependence check runs on homogenised bids


def test_dependence_check_fails_on_an_undeclared_covariate_and_passes_once_declared():
    from counterbid.estimators.checks import auction_dependence_check

    bids = simulate_experiment(VALUES, experiment(None), n_bidders=5, n_auctions=10_000, rng=21,
                               scale_covariates={"footfall": (GAMMA, SIGNAL)})
    undeclared = auction_dependence_check(bids, experiment(None))
    declared = auction_dependence_check(bids, experiment())
    assert not undeclared.passed and undeclared.severity == "error", undeclared
    assert "scale_covariates" in undeclared.details["remedy"]
    # Declared: the homogenised bids of one auction are independent draws; z is N(0, 1) under the
    # null (the fitted slope moves r by O(1/N) only), so |z| < 4 on one seed.
    assert declared.passed and abs(declared.details["z"]) < 4, declared.details
    # What the spec does not model is still seen: an unobserved factor on top of the declared covariate.
    hidden = simulate_experiment(VALUES, experiment(None), n_bidders=5, n_auctions=10_000, rng=22,
                                 scale_covariates={"footfall": (GAMMA, SIGNAL)}, unobserved_scale_sd=0.3)
    assert not auction_dependence_check(hidden, experiment()).passed


def test_a_what_if_layout_is_scaled_back_too():
    raw = {"id": "lanes", "control_arm": "anchor", "scale_covariates": ["footfall"],
           "arms": [{"name": "anchor", "share": 0.8, "position_weights": WEIGHTS["anchor"]},
                    {"name": "tilted", "share": 0.2, "position_weights": WEIGHTS["tilted"]}],
           "what_if": [{"name": "flatter", "position_weights": [0.3, 0.2, 0.1, 0.05]}]}
    exp = parse_experiments({"experiments": [raw]})["lanes"]
    bids = simulate_experiment(VALUES, experiment(None), n_bidders=5, n_auctions=20_000, rng=31,
                               scale_covariates={"footfall": (GAMMA, SIGNAL)})
    rows = revenue(quiet_estimate(bids, exp))
    x = bids.groupby("auction_id")["footfall"].first()
    want = float(np.exp(GAMMA * x).mean()) * quad_revenue(VALUES, [0.3, 0.2, 0.1, 0.05], 5)
    est, se = rows.loc["flatter", ["estimate", "std_error"]]
    assert abs(est - want) <= 4 * se, (est, want, se)


def test_the_simulator_refuses_scaling_with_a_floor_and_keeps_the_factor_mean_one():
    with pytest.raises(InputError, match="not simulated with a floor"):
        simulate_experiment(VALUES, experiment(None, floor=0.2), n_bidders=3, n_auctions=10, rng=1,
                            scale_covariates={"footfall": (GAMMA, SIGNAL)})
    plain = simulate_experiment(VALUES, experiment(None), n_bidders=3, n_auctions=20_000, rng=2)
    hidden = simulate_experiment(VALUES, experiment(None), n_bidders=3, n_auctions=20_000, rng=2,
                                 unobserved_scale_sd=0.3)
    # same draws, each auction's values times exp(0.3 e - 0.045): the mean value ratio is 1 within
    # its Monte Carlo error (sd of the factor 0.31, over 20 000 auctions: 0.0022, more with the values'
    # own spread; 0.012 allowed, about 5 of those)
    assert hidden["value"].mean() / plain["value"].mean() == pytest.approx(1.0, abs=0.012)
    assert (hidden["position"].fillna(0).to_numpy() == plain["position"].fillna(0).to_numpy()).all()
