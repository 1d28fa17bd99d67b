"""Running bidder totals: the to-date bidder covariance from today's bidders only.

What each test can catch: the Gram form ``sum_b U_b U_b'`` (full, or extended day by day with
``old + sum_today [after after' - before before']``) giving other numbers than the per-bidder
recombination of :func:`combine_pieces` (weights ``M_s / M``, the factor ``B/(B-1)``, the lift by
the delta method, ``auto`` resolving to bidder), a distinct-bidder count that double counts a
returning bidder, a unit mismatch. Tolerance: exact identities, 1e-12 relative (the update
subtracts ``before before'`` from a sum of positive terms: rounding of order 1e-16 times the ratio
of the form to the lift's variance, far below 1e-12 at these sizes).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from counterbid.estimators import (
    BidderGram, InputError, bidder_totals, combine_pieces, extend_gram, gram_of, simulate_experiment, stratum_pieces,
)
from counterbid.estimators.study import study_experiment
from tests.estimators.test_pieces import VALUES, _same

pytestmark = pytest.mark.filterwarnings("ignore::counterbid.estimators.EstimatorWarning")


def _days(n_days: int = 4):
    """Days of one experiment whose bidders come back: a pool of 150 ids, 2–5 bidders an auction."""
    exp = study_experiment(0.3)
    days = []
    for d in range(n_days):
        bids = simulate_experiment(VALUES, exp, n_bidders={2: 0.3, 3: 0.4, 5: 0.3}, n_auctions=400 + 50 * d,
                                   rng=20 + d, bidder_pool=150)
        bids["bidder_id"] = "seat-" + bids["bidder_id"].astype(str)
        days.append(stratum_pieces(bids, exp, day=f"2026-05-{d + 1:02d}", cluster="bidder"))
    return exp, days


def _stripped(pieces):
    return [p.without_bidder_sums() for p in pieces]


@pytest.mark.parametrize("cluster", ["auto", "bidder"])
def test_full_gram_gives_the_per_bidder_recombination(cluster):
    exp, days = _days()
    pieces = [p for day in days for p in day]
    want = combine_pieces(pieces, exp, cluster=cluster)
    assert want.cluster == "bidder"
    got = combine_pieces(_stripped(pieces), exp, cluster=cluster, bidder_gram=gram_of(bidder_totals(pieces)))
    _same(got, want)


def test_gram_extended_day_by_day_equals_the_full_recombination():
    exp, days = _days(5)
    totals = bidder_totals(days[0])
    gram = gram_of(totals)
    stored = dict(zip(totals.bidder_ids, totals.sums))  # what the results database keeps per bidder
    for n in range(1, len(days)):
        today = bidder_totals(days[n], bid_exponent=gram.bid_exponent)
        seen = np.array([b in stored for b in today.bidder_ids])
        before = np.array([stored.get(b, np.zeros(today.sums.shape[1])) for b in today.bidder_ids])
        gram, after = extend_gram(gram, today, before, seen)
        stored.update(zip(today.bidder_ids, after))
        window = [p for day in days[: n + 1] for p in day]
        assert gram.n_bidders == len({str(b) for p in window for b in p.bidder_ids})
        _same(combine_pieces(_stripped(window), exp, bidder_gram=gram), combine_pieces(window, exp))
    # the rows of the running totals are the full totals, bidder by bidder
    full = bidder_totals([p for day in days for p in day])
    np.testing.assert_allclose(np.array([stored[b] for b in full.bidder_ids]), full.sums, rtol=1e-12, atol=1e-12)


def test_auto_resolves_to_auction_when_no_bidder_repeats():
    exp, days = _days(1)
    pieces = days[0]
    gram = gram_of(bidder_totals(pieces))
    many = dataclasses.replace(gram, n_bidders=sum(p.n_bids for p in pieces))  # every bid its own bidder
    got = combine_pieces(_stripped(pieces), exp, bidder_gram=many)
    assert got.cluster == "auction"
    _same(got, combine_pieces(_stripped(pieces), exp, cluster="auction"))


def test_units_and_shapes_are_checked():
    exp, days = _days(2)
    gram = gram_of(bidder_totals(days[0]))
    today = bidder_totals(days[1])
    with pytest.raises(InputError, match="unit"):
        extend_gram(dataclasses.replace(gram, bid_exponent=3), today, np.zeros_like(today.sums),
                    np.zeros(today.sums.shape[0], dtype=bool))
    with pytest.raises(InputError, match="stored rows"):
        extend_gram(gram, today, np.zeros((1, 4)), np.zeros(1, dtype=bool))
    with pytest.raises(InputError, match="revenue labels"):
        combine_pieces(_stripped(days[0]), exp, cluster="bidder",
                       bidder_gram=BidderGram(gram=np.eye(2), n_bidders=10, bid_exponent=0))
    with pytest.raises(InputError, match="no bidder sums"):
        bidder_totals(_stripped(days[0]))
