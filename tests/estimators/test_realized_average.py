"""The shared realized per-arm average against the plain pandas computation of the same numbers.

Realized revenue of an auction = sum over its bids of bid x the arm's weight of the bid's position;
the per-arm figure is the mean over the arm's auctions, its standard error the auction-clustered
one, sqrt(G / (G - 1) * sum_a (R_a - mean)^2) / A_k with G all auctions (zero influence outside
the arm), the usual cluster-robust form (Cameron & Miller 2015).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import scipy.stats as st

from counterbid.estimators import estimate_arms, parse_experiments, prepare_bids, simulate_experiment
from counterbid.estimators._realized import realized_averages
from counterbid.estimators.study import simulate_prepared, study_experiment

DOC = {"experiments": [{"id": "r", "control_arm": "a", "arms": [
    {"name": "a", "share": 0.6, "position_weights": [0.31, 0.17, 0.06]},
    {"name": "b", "share": 0.3, "position_weights": [0.4, 0.1]},
    {"name": "c", "share": 0.1, "position_weights": [0.2, 0.2, 0.2, 0.2]}]}]}


def _plain(bids: pd.DataFrame, exp) -> pd.DataFrame:
    weight = {a.name: dict(enumerate(a.position_weights, start=1)) for a in exp.arms}
    revenue = [0.0 if pd.isna(p) else b * weight[arm].get(int(p), 0.0)
               for arm, b, p in zip(bids["arm"], bids["bid"], bids["position"])]
    per_auction = bids.assign(revenue=revenue).groupby("auction_id").agg(arm=("arm", "first"), revenue=("revenue", "sum"))
    g = len(per_auction)
    rows = {}
    for arm, grp in per_auction.groupby("arm"):
        dev = grp["revenue"] - grp["revenue"].mean()
        rows[arm] = (grp["revenue"].mean(), np.sqrt(g / (g - 1) * (dev**2).sum()) / len(grp), len(grp))
    return pd.DataFrame(rows, index=["mean", "se", "auctions"]).T


def test_realized_averages_match_the_plain_groupby():
    exp = parse_experiments(DOC)["r"]
    bids = simulate_experiment(st.lognorm(0.5, scale=0.8), exp, n_bidders={3: 0.5, 5: 0.5}, n_auctions=3000, rng=3)
    got = realized_averages(prepare_bids(bids, exp), exp)
    want = _plain(bids, exp).loc[list(exp.arm_names)]
    np.testing.assert_allclose(got.mean, want["mean"], rtol=1e-12)
    np.testing.assert_allclose(got.std_error, want["se"], rtol=1e-10)
    np.testing.assert_array_equal(got.auctions, want["auctions"].astype(int))
    out = estimate_arms(bids, exp).table.set_index(["arm", "metric"])
    for k, name in enumerate(exp.arm_names):
        assert out.loc[(name, "realized_revenue_per_auction"), "estimate"] == got.mean[k]


def test_study_path_uses_the_same_average():
    exp = study_experiment(0.2)
    data = simulate_prepared("beta", exp, n_bidders=4, n_auctions=500, rng=np.random.default_rng(1))
    got = realized_averages(data, exp)
    treated = data.arm == 1
    weights = np.concatenate([[0.0], exp.arms[1].weights_for(4)])
    plain = np.sum(data.bid[treated] * weights[data.position[treated]]) / (np.count_nonzero(treated) // 4)
    assert np.isclose(got.mean[1], plain, rtol=1e-12, atol=0)
