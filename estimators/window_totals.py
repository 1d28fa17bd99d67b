"""Running bidder totals of an analysis window: the to-date bidder covariance from today's bidders only.

Bidder clustering needs, over the distinct bidders ``b`` of the window, ``sum_b S_b S_b'`` with
``S_b = sum_s pi_s S_{b,s}`` (:mod:`.combine`). Kept unnormalized, ``U_b = sum_s M_s S_{b,s}`` does
not depend on the window's total auctions ``M``, so a day adds to it: with today's contributions
``t_b``, ``sum_b (U_b + t_b)(U_b + t_b)' = old + sum_{b in today} [(U_b + t_b)(U_b + t_b)' - U_b U_b']``
and ``B`` grows by today's bidders not seen before. :func:`bidder_totals` forms ``U_b`` from pieces,
:func:`gram_of` the full form, :func:`extend_gram` the update.

References
----------
.. [1] Cameron, A. C. & Miller, D. L. (2015). A practitioner's guide to cluster-robust inference.
   J. Human Resources 50(2), 317-372 (the cluster-robust sandwich as a sum of outer products).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from ._ids import ids_as_text
from .combine import BidderGram
from .errors import InputError
from .pieces import StratumPiece

__all__ = ["WindowTotals", "bidder_totals", "extend_gram", "gram_of"]


@dataclass(frozen=True)
class WindowTotals:
    """``U_b`` per distinct bidder: ``sum_s M_s 2**(e_s - bid_exponent) S_{b,s}``.

    Attributes
    ----------
    bidder_ids : numpy.ndarray
        Distinct bidder ids as text (object array), in first-seen order.
    sums : numpy.ndarray
        ``(B, K + 1)``: each arm's revenue, then the mixture's.
    bid_exponent : int
        Unit of the sums: ``2**bid_exponent`` bids.
    """

    bidder_ids: np.ndarray
    sums: np.ndarray
    bid_exponent: int


def bidder_totals(pieces: Sequence[StratumPiece], *, bid_exponent: int | None = None) -> WindowTotals:
    """Each distinct bidder's influence sums weighted by their strata's auctions, added across pieces.

    Parameters
    ----------
    pieces : sequence of StratumPiece
        Pieces that all carry bidder sums (bidders meet on the text of their id).
    bid_exponent : int, optional
        Unit of the result (default: the largest of the pieces'); no piece may have a larger one.

    Returns
    -------
    WindowTotals

    References
    ----------
    .. [1] Cameron, A. C. & Miller, D. L. (2015). J. Human Resources 50(2), 317-372.
    """
    pieces = list(pieces)
    if not pieces:
        raise InputError("bidder totals: no pieces")
    lacking = next((p for p in pieces if p.bidder_sums is None), None)
    if lacking is not None:
        raise InputError(f"bidder totals: the piece of {lacking.key.describe()} has no bidder sums")
    top = max(p.bid_exponent for p in pieces)
    exponent = top if bid_exponent is None else int(bid_exponent)
    if top > exponent:
        raise InputError(f"bidder totals: a piece is in units of 2**{top} bids, above 2**{exponent}")
    ids = [ids_as_text(p.bidder_ids) for p in pieces]
    codes, uniques = pd.factorize(np.concatenate(ids), sort=False)
    n_columns = pieces[0].bidder_sums.shape[1]
    sums = np.zeros((n_columns, len(uniques)))
    bounds = np.cumsum([0] + [i.size for i in ids])
    for p, lo, hi in zip(pieces, bounds[:-1], bounds[1:]):
        w = p.n_auctions * math.ldexp(1.0, p.bid_exponent - exponent)
        for j in range(n_columns):
            sums[j] += np.bincount(codes[lo:hi], weights=w * p.bidder_sums[:, j], minlength=len(uniques))
    return WindowTotals(bidder_ids=np.asarray(uniques, dtype=object), sums=sums.T.copy(), bid_exponent=exponent)


def gram_of(totals: WindowTotals) -> BidderGram:
    """``sum_b U_b U_b'`` over the bidders of ``totals`` (the full recombination).

    Parameters
    ----------
    totals : WindowTotals

    Returns
    -------
    BidderGram

    References
    ----------
    .. [1] Cameron, A. C. & Miller, D. L. (2015). J. Human Resources 50(2), 317-372.
    """
    return BidderGram(gram=totals.sums.T @ totals.sums, n_bidders=int(totals.sums.shape[0]),
                      bid_exponent=int(totals.bid_exponent))


def extend_gram(gram: BidderGram, today: WindowTotals, before: np.ndarray, seen: np.ndarray
                ) -> tuple[BidderGram, np.ndarray]:
    """Add today's bidder totals to the window's running form.

    Parameters
    ----------
    gram : BidderGram
        The window so far.
    today : WindowTotals
        Today's pieces' totals (:func:`bidder_totals`), in the unit of ``gram``.
    before : numpy.ndarray
        ``(B_today, K + 1)``: the window's ``U_b`` of today's bidders, row by row (zeros for a
        bidder not seen before).
    seen : numpy.ndarray of bool
        ``(B_today,)``: whether the window already holds the bidder.

    Returns
    -------
    (BidderGram, numpy.ndarray)
        The extended form (``old + sum_today [after after' - before before']``, ``B`` plus the new
        bidders) and today's bidders' totals after the day (``before + today``).

    References
    ----------
    .. [1] Cameron, A. C. & Miller, D. L. (2015). J. Human Resources 50(2), 317-372.
    """
    if today.bid_exponent != gram.bid_exponent:
        raise InputError(f"bidder totals: today's unit 2**{today.bid_exponent} differs from the window's "
                         f"2**{gram.bid_exponent}; rebuild the window from its pieces")
    before = np.asarray(before, dtype=float)
    seen = np.asarray(seen, dtype=bool)
    if before.shape != today.sums.shape or seen.shape != (today.sums.shape[0],):
        raise InputError(f"bidder totals: {before.shape} stored rows for {today.sums.shape} of today")
    after = before + today.sums
    new = gram.gram + (after.T @ after - before.T @ before)
    return BidderGram(gram=new, n_bidders=int(gram.n_bidders + np.count_nonzero(~seen)),
                      bid_exponent=gram.bid_exponent), after
