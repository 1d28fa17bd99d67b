"""Influence-function standard errors vs the Monte Carlo spread (seeded).

Serfling, R. (1980), Approximation Theorems of Mathematical Statistics, sec. 8.2 (influence
function of L-statistics). The test compares the mean reported SE with the standard deviation of
the estimates over independent simulated days; with 200 days the sd itself is known to ~5 %
(relative sd of a sample sd ~ 1/sqrt(2 (R - 1)) = 0.05), so [0.85, 1.15] is three of those.
Welfare is published without an interval (see ``estimate_arms``), so only its absence is checked.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats as st

from counterbid.estimators import estimate_arms, parse_experiments, simulate_experiment

DOC = {"experiments": [{"id": "se", "control_arm": "control", "arms": [
    {"name": "control", "share": 0.8, "position_weights": [0.31, 0.17, 0.06, 0.02]},
    {"name": "wide", "share": 0.1, "position_weights": [0.29, 0.22, 0.15, 0.02]},
    {"name": "single", "share": 0.1, "position_weights": [0.4]}]}]}


def monte_carlo(values, cluster, seed, days=200):
    exp = parse_experiments(DOC)["se"]
    rng = np.random.default_rng(seed)
    estimates, ses = [], []
    for _ in range(days):
        bids = simulate_experiment(values, exp, n_bidders=5, n_auctions=3000, rng=rng, bidder_pool=600)
        out = estimate_arms(bids, exp, cluster=cluster)
        estimates.append(out.table["estimate"].to_numpy())
        ses.append(out.table["std_error"].to_numpy())
    keys = list(zip(out.table["arm"], out.table["metric"]))
    welfare = (out.table["metric"] == "welfare_per_auction").to_numpy()
    assert np.isnan(np.asarray(ses)[:, welfare]).all() and (out.table.loc[welfare, "status"] == "no_interval").all()
    ratio = np.mean(ses, axis=0) / np.std(estimates, axis=0, ddof=1)
    return {k: r for k, r, w in zip(keys, ratio, welfare) if not w}


@pytest.mark.slow
@pytest.mark.parametrize("cluster", ["auction", "bidder"])
def test_se_matches_monte_carlo_spread_lognormal(cluster):
    ratio = monte_carlo(st.lognorm(0.5, scale=0.8), cluster, 2024 if cluster == "auction" else 7)
    bad = {k: round(float(r), 3) for k, r in ratio.items() if not 0.85 <= r <= 1.15}
    assert not bad, f"SE / Monte Carlo sd outside [0.85, 1.15]: {bad}"


@pytest.mark.slow
def test_se_matches_monte_carlo_spread_uniform_values():
    ratio = monte_carlo(st.uniform(0.0, 1.0), "auction", 99)
    bad = {k: round(float(r), 3) for k, r in ratio.items() if not 0.85 <= r <= 1.15}
    assert not bad, f"SE / Monte Carlo sd outside [0.85, 1.15]: {bad}"
