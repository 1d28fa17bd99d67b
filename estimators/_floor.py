"""The one implementation of the floor step of the weighted order statistic (per stratum).

The stratum kernel (``estimators.stratum``) calls these, for the pieces and the Monte Carlo study
alike: the floor's quantile ``q*`` is estimated by the share of sub-floor bids, the sorted bids are
clamped at the floor, and each bid's influence gains the term of the estimated ``q*``
(docs/method.md, "A floor shared by the arms").
"""

from __future__ import annotations

import numpy as np

from .payment_rules import Floor

__all__ = ["add_floor_influence", "clamp_at_floor"]


def clamp_at_floor(sorted_bids: np.ndarray, floor_value: float) -> tuple[Floor | None, int]:
    """Estimate the floor's quantile and clamp the sorted bids at the floor, in place.

    Parameters
    ----------
    sorted_bids : ndarray
        Bids of one stratum in ascending order; overwritten with ``max(b, floor_value)`` (the
        order is kept).
    floor_value : float
        The floor ``r`` (> 0), in the units of the bids.

    Returns
    -------
    floor : Floor or None
        ``Floor(r, q*)`` with ``q* = (#bids < r) / N`` (a bid equal to the floor is eligible);
        ``None`` when every bid lies below the floor (a degenerate stratum).
    n_below : int
        Number of sub-floor bids: the first ``n_below`` sorted bids.
    """
    big_n = sorted_bids.size
    n_below = int(np.searchsorted(sorted_bids, floor_value, side="left"))
    floor = Floor(floor_value, n_below / big_n) if n_below < big_n else None
    np.maximum(sorted_bids, floor_value, out=sorted_bids)
    return floor, n_below


def add_floor_influence(influence: np.ndarray, n_below: int, slope: float, quantile: float) -> None:
    """Add the estimated floor quantile's term ``slope * (1{b < r} - q*)`` to each sorted bid's influence.

    Parameters
    ----------
    influence : ndarray
        Influence function at the sorted bids (modified in place).
    n_below : int
        Sub-floor bids (the first ``n_below`` sorted ones).
    slope : float
        Derivative of the estimate in ``q*`` (``n * floor_slope`` of the weights, per auction).
    quantile : float
        The estimated ``q*``.
    """
    influence[:n_below] += slope * (1.0 - quantile)
    influence[n_below:] -= slope * quantile
