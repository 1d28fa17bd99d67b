"""The counting checks on auction counts alone, and the distribution checks told they ran on a sample.

``sample_ratio`` and the minimum-sample checks need only auctions per arm and number of bidders;
the pipeline counts those in DuckDB over a whole day and hands them over as ``AuctionCounts``.
Here the counts come from a plain pandas group-by of the bids (not the project's code), and every
outcome must equal the one computed from the bids themselves.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scipy.stats as st

from counterbid.estimators import InputError, parse_experiments, simulate_experiment
from counterbid.estimators.checks import (
    AuctionCounts,
    auction_counts,
    equilibrium_checks,
    minimum_sample_checks,
    sample_ratio_check,
)

SPEC = {"experiments": [{
    "id": "shelf-order", "control_arm": "steady",
    "arms": [{"name": "steady", "share": 0.6, "position_weights": [0.35, 0.15, 0.05]},
             {"name": "steep", "share": 0.4, "position_weights": [0.45, 0.10, 0.02]}]}]}
EXP = parse_experiments(SPEC)["shelf-order"]


@pytest.fixture(scope="module")
def bids():
    """Three strata, a few single-bidder auctions (the checks leave them out), an arm short of auctions."""
    parts = [simulate_experiment(st.lognorm(0.5), EXP, n_bidders=n, n_auctions=m, rng=n, first_auction_id=10_000 * n)
             for n, m in ((2, 400), (3, 300), (5, 40))]
    frame = pd.concat(parts, ignore_index=True)
    lone = frame.drop_duplicates("auction_id").head(7).assign(auction_id=lambda f: f["auction_id"] + 1_000_000)
    frame = pd.concat([frame, lone], ignore_index=True)
    steep = frame["auction_id"].isin(frame.loc[frame["arm"] == "steep", "auction_id"].unique()[:120])
    return frame.loc[~steep].reset_index(drop=True)  # 120 'steep' auctions lost: a sample-ratio fault


def _counts_by_group_by(frame):
    per_auction = frame.groupby("auction_id").agg(arm=("arm", "first"), n_bidders=("bid", "size"))
    return per_auction.groupby(["arm", "n_bidders"]).size().rename("n_auctions").reset_index()


def test_counts_give_the_same_outcomes_as_the_bids(bids):
    counts = AuctionCounts.from_frame(_counts_by_group_by(bids), EXP)
    assert counts.day_bids == len(bids)
    assert counts.n_bidders.tolist() == [2, 3, 5]  # the single-bidder auctions are not a stratum
    direct = auction_counts(bids, EXP)
    assert np.array_equal(direct.auctions, counts.auctions) and direct.day_bids == counts.day_bids
    for got, want in [(sample_ratio_check(counts, EXP), sample_ratio_check(bids, EXP)),
                      *zip(minimum_sample_checks(counts, EXP), minimum_sample_checks(bids, EXP))]:
        assert got == want  # check, severity, passed, observed and details, exactly
    srm = sample_ratio_check(counts, EXP)
    assert not srm.passed and srm.observed < 1e-3
    # Pearson's chi-square outside the project, on the arms' auctions
    arms = bids.groupby("auction_id")["arm"].first()[bids.groupby("auction_id").size() >= 2].value_counts()
    observed = np.array([arms["steady"], arms["steep"]], dtype=float)
    assert srm.observed == pytest.approx(st.chisquare(observed, observed.sum() * np.array([0.6, 0.4])).pvalue, rel=1e-12)


def test_equilibrium_checks_take_whole_day_counts_and_mark_the_sampled_checks(bids):
    whole = AuctionCounts.from_frame(_counts_by_group_by(bids), EXP)
    half = bids[bids["auction_id"] % 2 == 0]  # a sample of whole auctions
    note = {"shard": 0, "shards": 2, "bids_used": len(half), "day_bids": whole.day_bids}
    sampled = {r.check: r for r in equilibrium_checks(half, EXP, counts=whole, sample=note)}
    on_day = {r.check: r for r in equilibrium_checks(bids, EXP)}
    on_half = {r.check: r for r in equilibrium_checks(half, EXP)}
    for name in ("sample_ratio", "min_auctions_per_arm", "min_auctions_per_stratum"):
        assert sampled[name] == on_day[name] and "sample" not in sampled[name].details
    for name in ("monotone_values", "shading", "drift"):
        assert sampled[name].details["sample"] == note
        assert sampled[name].observed == on_half[name].observed
        assert {k: v for k, v in sampled[name].details.items() if k != "sample"} == dict(on_half[name].details)


def test_bad_counts_are_named():
    good = pd.DataFrame({"arm": ["steady", "steep"], "n_bidders": [3, 3], "n_auctions": [10, 8]})
    with pytest.raises(InputError, match=r"^auction counts: unknown arm 'bold' at row 1 "):
        AuctionCounts.from_frame(good.assign(arm=["steady", "bold"]), EXP)
    with pytest.raises(InputError, match=r"^auction counts: column 'n_auctions' row 0 is not a count: -1$"):
        AuctionCounts.from_frame(good.assign(n_auctions=[-1, 8]), EXP)
    with pytest.raises(InputError, match=r"^auction counts: column 'n_bidders' is missing"):
        AuctionCounts.from_frame(good.drop(columns="n_bidders"), EXP)
    with pytest.raises(InputError, match=r"^auction counts: no auction of experiment 'shelf-order' has two or more"):
        AuctionCounts.from_frame(good.assign(n_bidders=[1, 1]), EXP)
    with pytest.raises(InputError, match=r"`counts` must be AuctionCounts"):
        equilibrium_checks(simulate_experiment(st.lognorm(0.5), EXP, n_bidders=3, n_auctions=50, rng=1), EXP,
                           counts=good)
