"""The one implementation of the realized per-arm average (realized revenue over an arm's own auctions)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from .payment_rules import per_click_prices

if TYPE_CHECKING:  # pragma: no cover
    from .arms import PreparedBids
    from .spec import Experiment

__all__ = ["RealizedAverages", "realized_averages"]


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
    revenue_of_auction = np.bincount(data.auction, weights=realized, minlength=data.n_auctions)
    del realized
    arm_of_auction = np.zeros(data.n_auctions, dtype=np.int64)
    arm_of_auction[data.auction] = data.arm
    auctions_of_arm = np.bincount(arm_of_auction, minlength=k_arms)
    bids_of_arm = np.bincount(data.arm, minlength=k_arms)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean_of_arm = np.bincount(arm_of_auction, weights=revenue_of_auction, minlength=k_arms) / auctions_of_arm
        deviation = revenue_of_auction - mean_of_arm[arm_of_auction]
        squares = np.bincount(arm_of_auction, weights=deviation * deviation, minlength=k_arms)
        squares /= auctions_of_arm.astype(float) ** 2
    g = data.n_auctions
    factor = g / (g - 1) if g >= 2 else np.nan
    std_error = np.where(auctions_of_arm > 0, np.sqrt(factor * squares), np.nan)
    mean_of_arm = np.where(auctions_of_arm > 0, mean_of_arm, np.nan)
    mean_all = float(revenue_of_auction.sum() / g)
    deviation = revenue_of_auction - mean_all
    mixture_se = float(np.sqrt(factor * float(deviation @ deviation))) / g
    return RealizedAverages(mean=mean_of_arm, std_error=std_error, auctions=auctions_of_arm, bids=bids_of_arm,
                            mixture_mean=mean_all, mixture_std_error=mixture_se)
