"""Which population an interval speaks for: bidder vs auction clustering, strata, lift coverage.

Monte Carlo checks (seeded). Tolerances come from each test's own Monte Carlo error:
* coverage over R replicates has binomial sd sqrt(p (1 - p) / R) (0.0126 at p = 0.95, R = 300);
  checks allow 3 sd;
* SE / Monte Carlo sd: the sample sd over R replicates has relative sd about 1 / sqrt(2 (R - 1))
  (Kendall & Stuart, normal theory; 0.041 at R = 300); checks allow 3 of those.

Truth is Myerson's formula by quadrature (``expected_revenue_per_auction``; Myerson 1981, Lemma 3),
a population value: the revenue of the value distribution, i.e. of a new draw of bidders.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
import scipy.stats as st

from counterbid.estimators import (
    EstimatorWarning, PreparedBids, allocation_rule, equilibrium_bid_function, estimate_arms,
    expected_revenue_per_auction, mixture_rule, simulate_experiment,
)
from counterbid.estimators.study import simulate_prepared, study_experiment

VALUES = st.lognorm(0.5, scale=0.8)
Z95 = float(st.norm.ppf(0.975))


def _binomial_band(p: float, reps: int, k: float = 3.0) -> tuple[float, float]:
    sd = math.sqrt(p * (1 - p) / reps)
    return p - k * sd, p + k * sd


def _estimate(data, exp, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", EstimatorWarning)  # welfare's missing interval
        return estimate_arms(data, exp, **kw).table.set_index(["arm", "metric"])


# --------------------------------------------------------------------------------------------
# A persistent bidder pool: each bidder draws its value once and bids the same equilibrium bid in
# every auction it enters.


class PersistentPool:
    """Bids of ``pool`` bidders whose values persist across ``n_auctions`` auctions of ``n`` bidders."""

    def __init__(self, values, exp, *, n_bidders: int, n_auctions: int, pool: int):
        self.exp, self.n, self.a, self.pool = exp, n_bidders, n_auctions, pool
        rules = [allocation_rule(arm.weights_for(n_bidders), n_bidders) for arm in exp.arms]
        self.bid_of_quantile = equilibrium_bid_function(values, mixture_rule(rules, exp.shares))
        self.weights = np.stack([np.asarray(arm.weights_for(n_bidders)) for arm in exp.arms])

    def draw(self, rng: np.random.Generator) -> PreparedBids:
        n, a = self.n, self.a
        bid_of_bidder = self.bid_of_quantile(rng.random(self.pool))  # a new pool: its values drawn once
        offset = rng.integers(0, self.pool, size=(a, 1))  # n distinct bidders per auction
        bidder = (offset + np.arange(n)[None, :]) % self.pool
        bids = bid_of_bidder[bidder]
        shares = np.asarray(self.exp.shares)
        arm_of_auction = rng.choice(shares.size, size=a, p=shares / shares.sum())
        rank = np.empty((a, n), dtype=np.int64)
        np.put_along_axis(rank, np.argsort(-bids, axis=1, kind="stable"), np.arange(1, n + 1)[None, :], axis=1)
        arm = np.repeat(arm_of_auction, n)
        shown = self.weights[arm, rank.ravel() - 1] > 0
        return PreparedBids(bid=bids.ravel(), auction=np.repeat(np.arange(a), n), bidder=bidder.ravel(),
                            arm=arm, position=np.where(shown, rank.ravel(), 0), n_bidders=np.full(a * n, n),
                            n_auctions=a, n_excluded_auctions=0, n_excluded_bids=0)


def _pool_coverage(reps: int, seed: int, *, n_auctions: int = 6000, pool: int = 300) -> dict:
    exp = study_experiment(0.3)
    n = 4
    sim = PersistentPool(VALUES, exp, n_bidders=n, n_auctions=n_auctions, pool=pool)
    truth = {arm.name: expected_revenue_per_auction(VALUES, arm.position_weights, n) for arm in exp.arms}
    truth_lift = truth["treated"] / truth["control"] - 1.0
    rng = np.random.default_rng(seed)
    hits = {c: {"control": 0, "treated": 0, "lift": 0} for c in ("auction", "bidder")}
    width = {"auction": 0.0, "bidder": 0.0}
    for _ in range(reps):
        data = sim.draw(rng)
        for c in ("auction", "bidder"):
            out = _estimate(data, exp, cluster=c)
            for arm in ("control", "treated"):
                est, se = out.loc[(arm, "revenue_per_auction"), ["estimate", "std_error"]]
                hits[c][arm] += abs(est - truth[arm]) <= Z95 * se
                width[c] += se
            est, se = out.loc[("treated", "revenue_lift_vs_control"), ["estimate", "std_error"]]
            hits[c]["lift"] += abs(est - truth_lift) <= Z95 * se
    return {"coverage": {c: {k: v / reps for k, v in h.items()} for c, h in hits.items()},
            "se_ratio": width["bidder"] / width["auction"]}


def test_persistent_bidders_need_bidder_clustering():
    # A small pool and 40 replicates keep this to seconds; the slow test below measures coverage.
    reps = 40
    res = _pool_coverage(reps=reps, seed=5, n_auctions=1500, pool=100)
    assert res["se_ratio"] > 2.0  # bidder clustering widens the interval a lot here
    for k, cov in res["coverage"]["bidder"].items():
        assert cov >= _binomial_band(0.95, reps)[0], (k, cov)  # 0.847
    for k in ("control", "treated"):
        assert res["coverage"]["auction"][k] <= 0.6, res["coverage"]  # far below 95 %


@pytest.mark.slow
def test_persistent_bidders_bidder_intervals_cover_the_population_value():
    # 300 bidders whose values persist across 6000 auctions of 4 (80 bids each)
    reps = 200
    res = _pool_coverage(reps=reps, seed=11)
    lo, hi = _binomial_band(0.95, reps)  # [0.904, 0.996]
    bad = {k: v for k, v in res["coverage"]["bidder"].items() if not lo <= v <= hi}
    assert not bad, (res, (lo, hi))
    assert max(res["coverage"]["auction"][k] for k in ("control", "treated")) < 0.5, res


def test_auto_cluster_resolves_both_ways():
    exp = study_experiment(0.3)
    rng = np.random.default_rng(1)
    pooled = PersistentPool(VALUES, exp, n_bidders=4, n_auctions=500, pool=100).draw(rng)
    out = estimate_arms(pooled, exp)  # default: auto
    assert out.cluster == "bidder"
    explicit = estimate_arms(pooled, exp, cluster="bidder")
    np.testing.assert_array_equal(out.table["std_error"].to_numpy(), explicit.table["std_error"].to_numpy())
    # every bid from its own bidder (as simulate_prepared labels them): auction clustering
    fresh = simulate_prepared("lognormal", exp, n_bidders=4, n_auctions=500, rng=rng)
    out = estimate_arms(fresh, exp)
    assert out.cluster == "auction"
    np.testing.assert_array_equal(out.table["std_error"].to_numpy(), estimate_arms(fresh, exp, cluster="auction").table["std_error"].to_numpy())
    # string bidder ids that repeat across auctions go through the frame path too
    bids = simulate_experiment(VALUES, exp, n_bidders=3, n_auctions=400, rng=2, bidder_pool=50)
    assert estimate_arms(bids.assign(bidder_id="b" + bids["bidder_id"].astype(str)), exp).cluster == "bidder"
    unique = bids.assign(bidder_id=np.arange(len(bids)))
    assert estimate_arms(unique, exp).cluster == "auction"


# --------------------------------------------------------------------------------------------
# Strata of varying n: standard errors against the Monte Carlo spread, coverage of revenue and lift.

STRATA_AUCTIONS = {2: 600, 4: 1500, 8: 400}


def _stack(parts: list[PreparedBids]) -> PreparedBids:
    offsets = np.cumsum([0] + [p.n_auctions for p in parts[:-1]])
    return PreparedBids(
        bid=np.concatenate([p.bid for p in parts]),
        auction=np.concatenate([p.auction + o for p, o in zip(parts, offsets)]),
        bidder=np.arange(sum(p.bid.size for p in parts)),
        arm=np.concatenate([p.arm for p in parts]),
        position=np.concatenate([p.position for p in parts]),
        n_bidders=np.concatenate([p.n_bidders for p in parts]),
        n_auctions=int(sum(p.n_auctions for p in parts)), n_excluded_auctions=0, n_excluded_bids=0)


@pytest.mark.slow
def test_standard_errors_and_coverage_with_strata_of_varying_size():
    reps = 300
    exp = study_experiment(0.3)
    total = sum(STRATA_AUCTIONS.values())
    truth = {arm.name: sum(m / total * expected_revenue_per_auction(VALUES, arm.position_weights, n)
                           for n, m in STRATA_AUCTIONS.items()) for arm in exp.arms}
    truth["lift"] = truth["treated"] / truth["control"] - 1.0
    rng = np.random.default_rng(2026)
    keys = {"control": ("control", "revenue_per_auction"), "treated": ("treated", "revenue_per_auction"),
            "lift": ("treated", "revenue_lift_vs_control")}
    est = {k: np.empty(reps) for k in keys}
    se = {k: np.empty(reps) for k in keys}
    for r in range(reps):
        data = _stack([simulate_prepared(VALUES, exp, n_bidders=n, n_auctions=m, rng=rng)
                       for n, m in STRATA_AUCTIONS.items()])
        out = _estimate(data, exp)
        for k, key in keys.items():
            est[k][r], se[k][r] = out.loc[key, ["estimate", "std_error"]]
    rel = 3 / math.sqrt(2 * (reps - 1))  # 0.12
    lo, hi = _binomial_band(0.95, reps)
    for k in keys:
        ratio = se[k].mean() / est[k].std(ddof=1)
        coverage = float(np.mean(np.abs(est[k] - truth[k]) <= Z95 * se[k]))
        assert 1 - rel <= ratio <= 1 + rel, (k, ratio)
        assert lo <= coverage <= hi, (k, coverage)
