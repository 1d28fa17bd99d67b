"""The benchmark's plain-pandas peer computes the same numbers as estimate_arms (small input)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import scipy.stats as st

from counterbid.estimators import estimate_arms, simulate_experiment

from .plain_pandas_peer import plain_pandas_estimate


def test_plain_pandas_peer_agrees_with_estimate_arms(three_arm_experiment):
    exp = three_arm_experiment
    bids = simulate_experiment(st.lognorm(0.5, scale=0.8), exp, n_bidders={4: 0.5, 5: 0.5}, n_auctions=3000, rng=7)
    bids = pd.concat([bids, bids.iloc[[0]].assign(auction_id=10**6)], ignore_index=True)  # one single-bidder auction
    want = estimate_arms(bids, exp, cluster="auction").table.set_index(["arm", "metric"])
    got = plain_pandas_estimate(bids, exp).set_index(["arm", "metric"])
    # welfare: estimate_arms reads the top of the bid distribution off the top spacings and
    # publishes no interval (method ordstat-2); the peer keeps the highest bid, so only revenue
    # and lift are compared exactly
    exact = [k for k in got.index if k[1] in ("revenue_per_auction", "revenue_lift_vs_control")]
    assert len(exact) == 4
    np.testing.assert_allclose(got.loc[exact, "estimate"], want.loc[exact, "estimate"], rtol=1e-10)
    np.testing.assert_allclose(got.loc[exact, "std_error"], want.loc[exact, "std_error"], rtol=1e-10)
    realized = [k for k in got.index if k[1] == "realized_revenue_per_auction"]
    assert len(realized) == 3
    np.testing.assert_allclose(got.loc[realized, "estimate"], want.loc[realized, "estimate"], rtol=1e-12)
    # the peer uses the textbook standard error of a mean (ddof=1 within the arm): close, not equal
    np.testing.assert_allclose(got.loc[realized, "std_error"], want.loc[realized, "std_error"], rtol=2e-3)
