"""Intra-auction correlation of rank normal scores: null calibration, the plain formula, power.

Under independence the within-stratum ranks are a uniformly random permutation whatever the value
distribution and the (increasing) bid function, so the statistic's null distribution can be
calibrated on iid draws (docs/method.md, "Auctions that differ: the dependence check"); real
equilibrium logs from the simulator are checked too.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.stats as st
from scipy import special

from counterbid.estimators import (
    InputError,
    estimate_arms,
    expected_revenue_per_auction,
    parse_experiments,
    prepare_bids,
    simulate_experiment,
)
from counterbid.estimators.checks import DEFAULT_CHECKS, DEPENDENCE_REMEDY, auction_dependence_check
from counterbid.estimators.dependence import _rank_scores, auction_dependence

# Invented layouts: a large control with two small arms.
EXP = parse_experiments({"experiments": [{
    "id": "storefront-tiles", "control_arm": "grid",
    "arms": [
        {"name": "grid", "share": 0.8, "position_weights": [0.31, 0.17, 0.06, 0.02]},
        {"name": "hero-tile", "share": 0.1, "position_weights": [0.36, 0.12, 0.05, 0.02]},
        {"name": "long-strip", "share": 0.1, "position_weights": [0.29, 0.19, 0.10, 0.05, 0.02]},
    ]}]})["storefront-tiles"]
VALUES = st.lognorm(0.5, scale=0.8)
CFG = DEFAULT_CHECKS["auction_dependence"]


def _layout(sizes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Auction codes and stratum keys (number of bidders) of auctions with the given sizes."""
    return np.repeat(np.arange(sizes.size), sizes), np.repeat(sizes, sizes)


def _scaled(values, *, n_bidders, n_auctions, sigma, seed):
    """An equilibrium log whose auctions carry an unobserved mean-1 log-normal scale factor.

    Without a floor the first-price equilibrium is scale-equivariant (a common factor c of every
    value of an auction known to its bidders gives bids c x beta(v / c)), so scaling each auction's
    equilibrium bids by its factor is the equilibrium of the scaled auction.
    """
    rng = np.random.default_rng(seed)
    bids = simulate_experiment(values, EXP, n_bidders=n_bidders, n_auctions=n_auctions, rng=rng)
    factor = np.exp(sigma * rng.standard_normal(n_auctions) - sigma**2 / 2)
    bids["bid"] *= factor[bids["auction_id"].to_numpy()]
    return bids


def _plain(bid, auction, stratum):
    """The statistic written out: scipy ranks per stratum, every ordered pair of an auction summed."""
    frame = pd.DataFrame({"bid": bid, "auction": auction, "stratum": stratum})
    num = den = 0.0
    per = {}
    for key, rows in frame.groupby("stratum"):
        z = special.ndtri((st.rankdata(rows["bid"]) - 0.5) / len(rows))
        z = (z - z.mean()) / np.sqrt(np.mean((z - z.mean()) ** 2))
        s_num = s_den = 0.0
        for _, idx in rows.groupby("auction").indices.items():
            zz = z[idx]
            s_num += sum(zz[i] * zz[k] for i in range(zz.size) for k in range(zz.size) if i != k)
            s_den += zz.size * (zz.size - 1)
        per[key] = s_num / s_den
        num, den = num + s_num, den + s_den
    return num / den, per


# -- the formula ---------------------------------------------------------------------------------


def test_vectorised_statistic_equals_the_plain_formula_with_ties_and_two_strata():
    rng = np.random.default_rng(3)
    sizes = rng.choice([2, 3, 5], size=300)
    auction, stratum = _layout(sizes)
    shared = np.repeat(rng.normal(size=sizes.size), sizes)
    bid = np.round(np.exp(0.4 * shared + rng.normal(size=auction.size)), 1)  # rounded: many ties
    got = auction_dependence(bid, auction, stratum)
    want, per = _plain(bid, auction, stratum)
    assert got.correlation == pytest.approx(want, rel=1e-12)
    assert {s.key: s.correlation for s in got.strata} == pytest.approx(per, rel=1e-12)
    pairs = int(np.sum(sizes * (sizes - 1) // 2))
    assert got.n_pairs == pairs and got.standard_error == pytest.approx(pairs**-0.5)
    # null mean: pair-weighted -1/(N_s - 1) (exact for a random permutation of centred scores)
    n_s = {k: int(np.sum(stratum == k)) for k in (2, 3, 5)}
    d_s = {k: float(np.sum(sizes[sizes == k] * (k - 1))) for k in (2, 3, 5)}
    assert got.null_mean == pytest.approx(-sum(d_s[k] / (n_s[k] - 1) for k in n_s) / sum(d_s.values()))


@pytest.mark.parametrize("decimals", [None, 2, 0])
def test_rank_scores_shortcut_equals_scipy_mid_ranks(decimals):
    """The one-argsort scores against ``scipy.stats.rankdata(method='average')`` (ties at 2 and 0 decimals)."""
    bid = np.random.default_rng(5).lognormal(size=20_000)
    bid = bid if decimals is None else np.round(bid, decimals)
    want = special.ndtri((st.rankdata(bid, method="average") - 0.5) / bid.size)
    np.testing.assert_array_equal(_rank_scores(bid), want)


def test_a_stratum_of_tied_bids_is_left_out_of_the_pooled_statistic():
    rng = np.random.default_rng(4)
    sizes = np.r_[np.full(200, 3), np.full(100, 4)]
    auction, stratum = _layout(sizes)
    bid = np.where(stratum == 4, 2.5, rng.random(auction.size))
    got = auction_dependence(bid, auction, stratum)
    alone = auction_dependence(bid[stratum == 3], auction[stratum == 3])
    assert np.isnan(got.strata[1].correlation) and got.strata[1].n_bids == 400
    assert got.correlation == pytest.approx(alone.correlation, rel=1e-12) and got.n_pairs == 600


@pytest.mark.parametrize("args,match", [
    (([1.0, 2.0], [0]), "one length"),
    (([1.0, np.nan], [0, 0]), "row 1 is not finite"),
    (([1.0, 2.0], [0.0, 0.0]), "integer auction codes"),
    (([1.0, 2.0, 3.0, 4.0], [0, 0, 1, 1], [2, 3, 2, 2]), "auction code 0 has bids in two strata"),
])
def test_bad_input_gets_one_line_naming_it(args, match):
    with pytest.raises(InputError, match=match):
        auction_dependence(*args)


# -- the null ------------------------------------------------------------------------------------


@pytest.mark.parametrize("mix,rounded", [((3,), False), ((2, 6), False), ((4,), True)])
def test_standard_error_matches_the_monte_carlo_spread_under_independence(mix, rounded):
    """SE / MC sd within 4 of its own MC standard errors: sd of a sample sd is sd / sqrt(2 (R - 1))."""
    rng = np.random.default_rng(len(mix) + 10 * rounded)
    sizes = rng.choice(mix, size=1500)
    auction, stratum = _layout(sizes)
    reps = 1500
    r = np.empty(reps)
    for k in range(reps):
        bid = rng.random(auction.size)
        r[k] = auction_dependence(np.round(bid, 1) if rounded else bid, auction, stratum).correlation
    dep = auction_dependence(rng.random(auction.size), auction, stratum)
    ratio = dep.standard_error / r.std(ddof=1)
    print(f"n in {mix}, rounded={rounded}: SE / MC sd = {ratio:.4f}, (mean - null) / SE = "
          f"{(r.mean() - dep.null_mean) / dep.standard_error:+.4f}")
    assert abs(ratio - 1) < 4 / np.sqrt(2 * (reps - 1)), ratio
    # the mean sits at the exact null mean, within 4 Monte Carlo standard errors
    assert abs(r.mean() - dep.null_mean) < 4 * dep.standard_error / np.sqrt(reps)


def test_real_equilibrium_logs_are_quiet():
    """Twenty clean simulated days: z is about N(0, 1), so sum z^2 ~ chi2(20) (P(> 45) = 0.001)."""
    z = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for s in range(20):
            n = (5, 3, {2: 0.3, 6: 0.7})[s % 3]
            values = (VALUES, st.uniform(0, 1), st.beta(2, 5, scale=3))[s % 3]
            bids = simulate_experiment(values, EXP, n_bidders=n, n_auctions=2000, rng=500 + s)
            result = auction_dependence_check(bids, EXP)
            assert result.passed, result.details
            z.append(result.details["z"])
    assert np.sum(np.square(z)) < st.chi2(20).ppf(0.999)


def false_alarm_rate(n_bids: int, reps: int, *, seed: int) -> float:
    """Share of clean logs of about ``n_bids`` bids (iid draws, 2-8 bidders) the check fails at defaults.

    Iid draws suffice: the statistic is a function of the within-stratum ranks, whose null
    distribution is the same for every continuous value distribution and increasing bid function.
    """
    rng = np.random.default_rng(seed)
    fails = 0
    for _ in range(reps):
        sizes = rng.choice([2, 3, 5, 8], size=max(1, n_bids // 4), p=[0.2, 0.3, 0.3, 0.2])
        auction, stratum = _layout(sizes)
        dep = auction_dependence(rng.random(auction.size), auction, stratum)
        fails += dep.p_value < CFG["alpha"] and dep.excess > CFG["min_correlation"]
    return fails / reps


def test_false_alarms_on_small_clean_logs_stay_under_one_percent():
    # 2000 logs of 10^3 bids and 500 of 10^4: the rate is about alpha = 0.1 %; under 1 % means at
    # most 20 (resp. 5) failures, a count a true 0.1 % rate exceeds with probability < 1e-9.
    rates = false_alarm_rate(1_000, 2000, seed=1), false_alarm_rate(10_000, 500, seed=2)
    print("false-alarm rates at 1e3 and 1e4 bids:", rates)
    assert max(rates) <= 0.01


@pytest.mark.slow
def test_false_alarms_up_to_ten_million_bids():
    """10^5 to 10^7 bids: the size bound binds (about 2.4 pairs per bid here, so 0.02 is 10 SE at 10^5 bids, 100 at 10^7)."""
    rates = {n: false_alarm_rate(n, reps, seed=n) for n, reps in ((100_000, 200), (1_000_000, 20), (10_000_000, 2))}
    print("false-alarm rates by bids:", rates)
    assert all(rate == 0 for rate in rates.values()), rates


# -- power -------------------------------------------------------------------------------------


def test_unobserved_scale_factor_of_log_sd_0_15_is_caught_at_50k_auctions():
    """r is about 0.116 with sd 0.002 over replicates here; the error bound 0.1 is > 5 sd below it."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = auction_dependence_check(_scaled(VALUES, n_bidders=5, n_auctions=50_000, sigma=0.15, seed=7), EXP)
    assert not result.passed and result.severity == "error", result
    assert result.observed > CFG["error_correlation"] and result.details["z"] > 50
    assert result.details["remedy"] == DEPENDENCE_REMEDY
    assert "segments:" in DEPENDENCE_REMEDY and "scale_covariates:" in DEPENDENCE_REMEDY


def test_pooled_segments_are_caught_and_each_segment_alone_is_quiet():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        low = simulate_experiment(VALUES, EXP, n_bidders=5, n_auctions=10_000, rng=11)
        high = simulate_experiment(st.lognorm(0.4, scale=1.3), EXP, n_bidders=5, n_auctions=10_000, rng=12,
                                   first_auction_id=10_000)
        pooled = auction_dependence_check(pd.concat([low, high], ignore_index=True), EXP)
        alone = [auction_dependence_check(part, EXP) for part in (low, high)]
    assert not pooled.passed and pooled.severity == "error" and pooled.observed > 0.2, pooled
    assert all(r.passed for r in alone), alone


def test_a_small_factor_fails_as_a_warning_and_severity_follows_the_config():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        bids = _scaled(VALUES, n_bidders=5, n_auctions=20_000, sigma=0.075, seed=8)  # r about 0.035
        data = prepare_bids(bids, EXP)
    result = auction_dependence_check(data, EXP)
    assert not result.passed and result.severity == "warning"
    assert CFG["min_correlation"] < result.observed < CFG["error_correlation"]
    assert auction_dependence_check(data, EXP, config={"auction_dependence": {"severity": "error"}}).severity == "error"
    assert auction_dependence_check(data, EXP, config={"auction_dependence": {"min_correlation": 0.05}}).passed


# -- the bias the correlation implies (slow; the calibration behind the thresholds) ------------------


def _truth(values, n_bidders) -> np.ndarray:
    """Revenue per auction of every arm in its own equilibrium: Myerson's formula by quadrature."""
    return np.array([expected_revenue_per_auction(values, a.position_weights, n_bidders) for a in EXP.arms])


def _relative_errors(bids, truth) -> tuple[float, np.ndarray, np.ndarray]:
    """The check's r, and each arm's (estimate / truth - 1) and relative standard error."""
    data = prepare_bids(bids, EXP)
    table = estimate_arms(data, EXP).table.set_index(["arm", "metric"])
    rows = table.loc[[(a.name, "revenue_per_auction") for a in EXP.arms]]
    r = auction_dependence(data.bid, data.auction, data.n_bidders).correlation
    return r, rows["estimate"].to_numpy() / truth - 1, rows["std_error"].to_numpy() / truth


@pytest.mark.slow
def test_bias_grows_with_the_correlation_as_the_thresholds_assume():
    """Pooled estimates against the truth, for an unobserved scale factor and for pooled segments.

    Truth with a mean-one factor c per auction: without a floor the first-price equilibrium scales
    (bids c x beta(v / c)) and so does revenue, so each arm's expected revenue is E[c] = 1 times the
    unscaled one (Myerson 1981 by quadrature). Two segments of equal size pooled: the auction-weighted
    average of the segments' revenues. Every bias must lie in [0.1 r, 0.5 r] (the range docs/method.md
    states) up to 4 relative standard errors of the estimate; below the warning bound r = 0.02 every
    bias is under 1 %.
    """
    base = _truth(VALUES, 5)
    cases = [("scale", s, _scaled(VALUES, n_bidders=5, n_auctions=50_000, sigma=s, seed=int(1000 * s)), base)
             for s in (0.05, 0.1, 0.2)]
    for k in (1.2, 1.5):
        other = st.lognorm(0.5, scale=0.8 * k)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            parts = [simulate_experiment(v, EXP, n_bidders=5, n_auctions=25_000, rng=seed, first_auction_id=first)
                     for v, seed, first in ((VALUES, 60, 0), (other, 61, 25_000))]
        cases.append(("segments", k, pd.concat(parts, ignore_index=True), (base + _truth(other, 5)) / 2))
    for kind, param, bids, truth in cases:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            r, bias, se = _relative_errors(bids, truth)
        print(f"{kind} {param}: r = {r:.4f}, bias by arm = {np.round(bias, 4)}, ratio of the largest = {bias.max() / r:.2f}")
        assert np.all(bias > 0.1 * r - 4 * se) and np.all(bias < 0.5 * r + 4 * se), (kind, param, r, bias)
        if r < DEFAULT_CHECKS["auction_dependence"]["min_correlation"]:
            assert np.all(bias < 0.01), (kind, param, r, bias)
