"""The one implementation of the realized per-arm average (realized revenue over an arm's own auctions)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

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


def realized_averages(data: PreparedBids, experiment: Experiment) -> RealizedAverages:
    """Average realized revenue (bid x position weight of the arm that ran) per auction, by arm.

    Realized revenue belongs to an auction, so these are averages over auctions of each
    auction's revenue ``R_a``, clustered by auction: the influence of auction ``a`` on arm
    ``k``'s average is ``(R_a - mean_k) / A_k`` on ``k``'s auctions and 0 elsewhere, and the
    variance carries the small-sample factor ``G / (G - 1)`` with ``G`` every auction.
    """
    arms = experiment.arms
    k_arms = len(arms)
    pos_weights = np.zeros((k_arms, int(max(data.position.max(), 1)) + 1))
    for k, a in enumerate(arms):
        pos_weights[k, 1:] = np.asarray(a.weights_for(pos_weights.shape[1] - 1))
    realized = pos_weights[data.arm, data.position]
    realized *= data.bid
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
