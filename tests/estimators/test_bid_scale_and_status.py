"""Bid units, degenerate strata, small strata and the ``status`` column of ``estimate_arms``.

The estimator is homogeneous of degree one in the bids: revenue, welfare, their standard errors
and interval ends scale with the bid unit, lifts do not move. Scaling by a power of two is exact in
IEEE-754 arithmetic, so those results must agree bit for bit; other factors round every bid once
(relative 1e-16), so agreement to 1e-9 leaves a wide margin.
"""

from __future__ import annotations

import dataclasses

import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.stats as st

from counterbid.estimators import (
    EstimatorWarning, InputError, RESULT_COLUMNS, estimate_arms, parse_experiments, simulate_experiment,
)
from counterbid.estimators import constants

SCALED = ["estimate", "std_error", "ci_low", "ci_high"]


def two_vs_three_slots():
    return parse_experiments({"experiments": [{"id": "units", "control_arm": "two", "arms": [
        {"name": "two", "share": 0.5, "position_weights": [1.0, 1.0]},
        {"name": "three", "share": 0.5, "position_weights": [1.0, 1.0, 1.0]}]}]})["units"]


def four_slot_row():
    # welfare is identified here (the mixture's top two positions differ)
    return parse_experiments({"experiments": [{"id": "units", "control_arm": "c", "arms": [
        {"name": "c", "share": 0.7, "position_weights": [0.31, 0.17, 0.06, 0.02]},
        {"name": "t", "share": 0.3, "position_weights": [0.36, 0.12, 0.05, 0.02]}]}]})["units"]


@pytest.fixture(scope="module")
def base():
    exp = four_slot_row()
    bids = simulate_experiment(st.lognorm(0.5, scale=0.8), exp, n_bidders={3: 0.4, 5: 0.6}, n_auctions=4000, rng=11)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", EstimatorWarning)
        return exp, bids, estimate_arms(bids, exp)


def _estimate(bids, exp, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", EstimatorWarning)
        return estimate_arms(bids, exp, **kw).table


@pytest.mark.parametrize("scale", [1e-6, 1.0, 1e3, 1e300, 2.0**-30, 2.0**40, 2.0**900])
def test_results_scale_with_the_bid_unit(base, scale):
    exp, bids, result = base
    ref = result.table
    out = _estimate(bids.assign(bid=bids["bid"] * scale), exp)
    lift = (out["metric"] == "revenue_lift_vs_control").to_numpy()
    exact = float(np.log2(scale)).is_integer()
    for col in SCALED:
        got, want = out[col].to_numpy(), ref[col].to_numpy()
        if exact:
            np.testing.assert_array_equal(got[~lift], want[~lift] * scale, err_msg=col)
            np.testing.assert_array_equal(got[lift], want[lift], err_msg=col)
        else:
            np.testing.assert_allclose(got[~lift], want[~lift] * scale, rtol=1e-9, err_msg=col)
            np.testing.assert_allclose(got[lift], want[lift], rtol=1e-9, atol=1e-12, err_msg=col)
    assert out["status"].tolist() == ref["status"].tolist()


def test_subnormal_bids_estimate(base):
    # bids around 1e-310 are subnormal doubles (fewer significant bits): same numbers to 1e-9
    exp, bids, result = base
    ref = result.table
    out = _estimate(bids.assign(bid=bids["bid"] * 1e-310), exp)
    revenue = (out["metric"] == "revenue_per_auction").to_numpy()
    np.testing.assert_allclose(out.loc[revenue, "estimate"] / 1e-310, ref.loc[revenue, "estimate"], rtol=1e-9)


def test_one_huge_bid_estimates_instead_of_overflowing(base):
    exp, bids, _ = base
    out = _estimate(bids.assign(bid=np.where(np.arange(len(bids)) == 17, 1e300, bids["bid"])), exp)
    revenue = out[out["metric"] == "revenue_per_auction"]
    assert np.isfinite(revenue[["estimate", "std_error"]].to_numpy()).all()
    assert (revenue["estimate"] > 1e290).all()  # the outlier dominates, as a weighted sum of bids must


def test_bids_near_the_largest_double_estimate_or_fail_in_one_line():
    exp = two_vs_three_slots()
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=5, n_auctions=500, rng=2)
    # 1e308 per bid: three slots sell ~3e308 per auction, beyond the largest double (1.8e308)
    huge = bids.assign(bid=1e308 * (1.0 + 0.5 * bids["bid"]))
    with pytest.raises(InputError, match=r"^bids: .*largest.*\d") as info:
        _estimate(huge, exp)
    assert "\n" not in str(info.value)
    near = bids.assign(bid=1e300 * (1.0 + bids["bid"]))
    out = _estimate(near, exp)
    assert np.isfinite(out[SCALED].to_numpy()[out["metric"] != "welfare_per_auction"]).all()


def test_every_bid_equal_is_degenerate_not_a_number():
    exp = two_vs_three_slots()
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=5, n_auctions=300, rng=3).assign(bid=0.25)
    with pytest.warns(EstimatorWarning, match=r"5 bidders: all 1500 bids equal 0\.25"):
        out = estimate_arms(bids, exp)
    counterfactual = out.table["metric"].isin(["revenue_per_auction", "welfare_per_auction", "revenue_lift_vs_control"])
    assert out.table.loc[counterfactual, SCALED].isna().all().all()
    assert out.table.loc[counterfactual, "status"].str.contains("degenerate").all()
    realized = out.table[out.table["metric"] == "realized_revenue_per_auction"]
    assert np.isfinite(realized["estimate"]).all() and (realized["status"] == "ok").all()


def test_one_degenerate_stratum_is_named_and_spoils_the_pooled_estimate():
    exp = two_vs_three_slots()
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders={3: 0.5, 5: 0.5}, n_auctions=1000, rng=4)
    per_auction = bids.groupby("auction_id")["bid"].transform("size")
    bids.loc[per_auction == 3, "bid"] = 0.5
    with pytest.warns(EstimatorWarning, match=r"stratum of 3 bidders: all \d+ bids equal 0\.5") as record:
        out = estimate_arms(bids, exp)
    assert not any("stratum of 5 bidders" in str(w.message) for w in record)
    revenue = out.table[out.table["metric"] == "revenue_per_auction"]
    assert revenue["estimate"].isna().all() and revenue["status"].str.contains("degenerate").all()


def test_all_zero_bids_are_degenerate_too():
    exp = two_vs_three_slots()
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=4, n_auctions=200, rng=5).assign(bid=0.0)
    with pytest.warns(EstimatorWarning, match="all 800 bids equal 0.0"):
        out = estimate_arms(bids, exp)
    assert out.table.loc[out.table["metric"] == "revenue_lift_vs_control", "estimate"].isna().all()


def test_small_strata_are_flagged_with_a_warning_and_a_status():
    assert constants.MIN_STRATUM_BIDS == 100
    exp = two_vs_three_slots()
    rng = np.random.default_rng(6)
    big = simulate_experiment(st.uniform(0, 1), exp, n_bidders=5, n_auctions=400, rng=rng)
    small = simulate_experiment(st.uniform(0, 1), exp, n_bidders=3, n_auctions=4, rng=rng, first_auction_id=10_000)
    bids = pd.concat([big, small], ignore_index=True)
    with pytest.warns(EstimatorWarning, match=r"fewer than 100 bids \(3 bidders: 12 bids\).*under-cover"):
        out = estimate_arms(bids, exp)
    counterfactual = out.table["metric"].isin(["revenue_per_auction", "revenue_lift_vs_control"])
    assert (out.table.loc[counterfactual, "status"] == "few_bids").all()
    assert (out.table.loc[out.table["metric"] == "realized_revenue_per_auction", "status"] == "ok").all()
    with warnings.catch_warnings():  # a large stratum alone: no such warning, status ok
        warnings.simplefilter("error", EstimatorWarning)
        warnings.filterwarnings("ignore", "welfare", EstimatorWarning)
        clean = estimate_arms(big, exp)
    assert (clean.table.loc[clean.table["metric"] == "revenue_per_auction", "status"] == "ok").all()


def test_status_column_follows_n_bids_and_the_result_says_how_it_was_computed(base):
    _, _, result = base
    out = result.table
    assert list(out.columns) == list(RESULT_COLUMNS)
    assert RESULT_COLUMNS[RESULT_COLUMNS.index("n_bids") + 1] == "status"
    assert result.confidence_level == 0.95 and result.cluster in ("auction", "bidder")
    with pytest.raises(dataclasses.FrozenInstanceError):
        result.cluster = "auction"
    known = set(constants.STATUS_FLAGS)
    assert all(set(s.split(",")) <= known for s in out["status"])


def test_welfare_is_published_without_an_interval(base):
    exp, bids, _ = base
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        out = estimate_arms(bids, exp)
    # a fixed property of the metric, said by its status flag: no warning on every run (task logs stay readable)
    assert not [w for w in caught if issubclass(w.category, EstimatorWarning)]
    welfare = out.table[out.table["metric"] == "welfare_per_auction"]
    assert np.isfinite(welfare["estimate"]).all()
    assert welfare[["std_error", "ci_low", "ci_high"]].isna().all().all()
    assert (welfare["status"] == "no_interval").all()
    others = out.table[out.table["metric"] != "welfare_per_auction"]
    assert np.isfinite(others["std_error"]).all() and (others["status"] == "ok").all()
