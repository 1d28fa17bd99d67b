"""The spec's ``max_bid``: a logged bid above it is refused in one line naming the row and the value."""

from __future__ import annotations

import scipy.stats as st
import pytest

from counterbid.estimators import InputError, estimate_arms, parse_experiments, prepare_bids, simulate_experiment

SPEC = {"experiments": [{"id": "tile-grid", "control_arm": "dense", "max_bid": 25.0, "arms": [
    {"name": "dense", "share": 0.5, "position_weights": [0.28, 0.2, 0.07]},
    {"name": "airy", "share": 0.5, "position_weights": [0.33, 0.12, 0.04]}]}]}
EXP = parse_experiments(SPEC)["tile-grid"]


@pytest.fixture(scope="module")
def bids():
    return simulate_experiment(st.lognorm(0.4, scale=2.0), EXP, n_bidders=4, n_auctions=400, rng=8)


def test_bids_up_to_the_bound_pass(bids):
    edge = bids.copy()
    edge.loc[7, "bid"] = 25.0  # the bound itself is a bid the marketplace accepts
    assert prepare_bids(edge, EXP).bid.max() == 25.0


def test_a_bid_above_the_bound_is_refused_naming_row_value_and_count(bids):
    bad = bids.copy()
    bad.loc[[311, 90], "bid"] = [2500.0, 26.0]
    with pytest.raises(InputError) as info:
        estimate_arms(bad, EXP, source="day.parquet")
    assert str(info.value) == ("day.parquet: column 'bid' row 90 is 26.0, above max_bid 25.0 of experiment "
                               "'tile-grid' (2 bids above it)")


def test_the_bound_reads_the_bid_before_quality(bids):
    # quality scales the ranking, not what the bidder typed: a bid of 20 at quality 3 is within a cap of 25
    scaled = bids.assign(quality=1.0)
    scaled.loc[5, ["bid", "quality"]] = [20.0, 3.0]
    assert prepare_bids(scaled, EXP).bid.max() == pytest.approx(60.0)
