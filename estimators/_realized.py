"""The one implementation of the realized per-arm average (realized revenue over an arm's own auctions)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from .payment_rules import per_click_prices

if TYPE_CHECKING:  # pragma: no cover
    from .bids import PreparedBids
    from .spec import Experiment

__all__ = ["RealizedAverages", "auction_revenues", "combine_realized", "realized_averages", "realized_cell"]


@dataclass(frozen=True)
class RealizedAverages:
    """Realized revenue per auction of each arm over its own auctions, and of all auctions.

    Attributes
    ----------
    mean, std_error : ndarray
        Per arm (NaN for an arm without auctions); standard errors clustered by auction.
    auctions, bids : ndarray of int
        Auctions and bids of each arm.
    mixture_mean, mixture_std_error : float
        Over every auction (the mixture that ran).
    """

    mean: np.ndarray
    std_error: np.ndarray
    auctions: np.ndarray
    bids: np.ndarray
    mixture_mean: float
    mixture_std_error: float


def realized_averages(data: PreparedBids, experiment: Experiment, *, floor: float | None = None) -> RealizedAverages:
    """Average realized revenue per auction, by arm, each shown bid priced by the rule that ran.

    A shown bid pays, per click, the price of ``experiment.payment_rule``
    (:func:`~.payment_rules.per_click_prices`: its own bid, the next-lower eligible bid or the
    floor, or the VCG externality), in effective-bid units; its expected payment per auction is
    the position weight of the arm that ran times that price (with quality factors, clicks
    ``w_k x quality`` times the currency price ``effective price / quality``). ``floor`` (in the
    units of ``data.bid``; default the experiment's) prices the lowest eligible bidders.

    Realized revenue belongs to an auction, so these are averages over auctions of each
    auction's revenue ``R_a``, clustered by auction: the influence of auction ``a`` on arm
    ``k``'s average is ``(R_a - mean_k) / A_k`` on ``k``'s auctions and 0 elsewhere, and the
    variance carries the small-sample factor ``G / (G - 1)`` with ``G`` every auction.
    """
    k_arms = len(experiment.arms)
    revenue_of_auction = auction_revenues(data, experiment, floor=floor)
    arm_of_auction = np.zeros(data.n_auctions, dtype=np.int64)
    arm_of_auction[data.auction] = data.arm
    n_of_auction = np.zeros(data.n_auctions, dtype=np.int64)
    n_of_auction[data.auction] = data.n_bidders
    strata = np.unique(n_of_auction)
    cells = []
    for n in strata.tolist():  # per stratum (number of bidders), as the stratum pieces keep them
        mask = None if strata.size == 1 else n_of_auction == n
        rev = revenue_of_auction if mask is None else revenue_of_auction[mask]
        arm = arm_of_auction if mask is None else arm_of_auction[mask]
        cells.append((*realized_cell(rev, arm, k_arms), n))
    return combine_realized(cells, [1.0] * len(cells))


def realized_cell(revenue: np.ndarray, arm: np.ndarray, k_arms: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Sufficient sums of one stratum: per arm the revenue sum, squared deviations from the arm's mean, auctions.

    ``revenue`` and ``arm`` are per auction of the stratum.
    """
    counts = np.bincount(arm, minlength=k_arms)
    sums = np.bincount(arm, weights=revenue, minlength=k_arms)
    with np.errstate(divide="ignore", invalid="ignore"):
        means = np.where(counts > 0, sums / counts, 0.0)
    deviation = revenue - means[arm]
    squares = np.bincount(arm, weights=deviation * deviation, minlength=k_arms)
    return sums, squares, counts.astype(np.int64)


def combine_realized(cells, units) -> RealizedAverages:
    """The realized per-arm averages of several strata from their sufficient sums.

    Parameters
    ----------
    cells : sequence of (sums, squares, auctions, n_bidders)
        Per stratum, :func:`realized_cell`'s sums and its number of bidders.
    units : sequence of float
        Each stratum's unit in the common unit (powers of two; sums scale by it, squares by its square).

    Notes
    -----
    Mean ``sum_s R_{s,k} / sum_s A_{s,k}``; squared deviations about the pooled mean combine
    exactly as ``sum_s Q_{s,k} + sum_s A_{s,k} (m_{s,k} - m_k)^2`` (Chan, Golub & LeVeque 1983),
    the same for the mixture over every (stratum, arm) cell; variance ``G/(G-1)`` times that over
    ``A_k^2`` with ``G`` every auction.
    """
    k_arms = cells[0][0].size
    auctions = np.zeros(k_arms, dtype=np.int64)
    bids = np.zeros(k_arms, dtype=np.int64)
    total = np.zeros(k_arms)
    for (sums, _, counts, n), u in zip(cells, units):
        auctions += counts
        bids += counts * int(n)
        total += u * sums
    g = int(auctions.sum())
    with np.errstate(divide="ignore", invalid="ignore"):
        mean = total / auctions
        mixture_mean = float(total.sum() / g)
        squares = np.zeros(k_arms)
        mixture_squares = 0.0
        for (sums, sq, counts, _), u in zip(cells, units):
            has = counts > 0
            cell_mean = np.where(has, u * sums / np.maximum(counts, 1), 0.0)
            own = (u * u) * sq
            squares += own + np.where(has, counts * (cell_mean - np.where(auctions > 0, mean, 0.0)) ** 2, 0.0)
            mixture_squares += float(own.sum()) + float(np.sum(np.where(has, counts * (cell_mean - mixture_mean) ** 2,
                                                                        0.0)))
        factor = g / (g - 1) if g >= 2 else np.nan
        std_error = np.where(auctions > 0, np.sqrt(factor * squares / auctions.astype(float) ** 2), np.nan)
        mean = np.where(auctions > 0, mean, np.nan)
    mixture_se = float(np.sqrt(factor * mixture_squares)) / g
    return RealizedAverages(mean=mean, std_error=std_error, auctions=auctions, bids=bids,
                            mixture_mean=mixture_mean, mixture_std_error=mixture_se)


def auction_revenues(data: PreparedBids, experiment: Experiment, *, floor: float | None = None) -> np.ndarray:
    """Realized revenue of every auction (indexed by auction code), each shown bid priced by the rule that ran.

    An auction's revenue depends on its own bids only, so it is the same whether computed on a
    whole log or on one stratum of it. ``floor`` is in the units of ``data.bid`` (default the
    experiment's).
    """
    arms = experiment.arms
    k_arms = len(arms)
    floor = float(experiment.floor or 0.0) if floor is None else float(floor)
    longest = max([len(a.position_weights or ()) for a in arms] + [1])
    pos_weights = np.zeros((k_arms, int(max(data.position.max(), longest, 1)) + 1))
    for k, a in enumerate(arms):
        pos_weights[k, 1:] = np.asarray(a.weights_for(pos_weights.shape[1] - 1))
    realized = pos_weights[data.arm, data.position]
    if experiment.payment_rule == "first_price":
        realized *= data.bid  # sub-floor bids are unshown (position weight 0)
    else:
        price = per_click_prices(data.auction, data.bid, data.arm, pos_weights[:, 1:],
                                 payment_rule=experiment.payment_rule, floor=floor)
        realized *= np.nan_to_num(price, nan=0.0)  # NaN: sub-floor, unshown
        del price
    return np.bincount(data.auction, weights=realized, minlength=data.n_auctions)
