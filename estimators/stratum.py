"""One stratum, from its sorted bids to every label's estimate and influence: the only copy of the kernel.

A stratum is a set of auctions with the same number of bidders ``n`` (and whatever else keys it:
day, segment, shard). Everything here is a function of its ``N`` sorted bids and the weights of
its ``n``: the floor step (:func:`floor_step`), each revenue label's weighted order statistic and
influence function (:func:`revenue_estimate`), each welfare label's estimate with its endpoint
terms (:func:`welfare_estimate`), and the loop over labels (:func:`estimate_stratum`). The
engines' stratum pieces (:mod:`.pieces`) and the Monte Carlo study (:mod:`.study`) both call
:func:`estimate_stratum`; they differ only in where the weights come from (:func:`table_weights`:
one spline table per stratum; the study: increments cached per sample size) and in what they do
with each influence function (auction and bidder sums; the study's standard error).

References
----------
.. [1] Serfling, R. (1980). Approximation Theorems of Mathematical Statistics, Wiley, sec. 8.2.
.. [2] Robson, D. S. & Whitlock, J. H. (1964). Estimation of a truncation point.
   Biometrika 51(1/2), 33-39.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from ._floor import add_floor_influence, clamp_at_floor
from ._lstatistic import BLOCK, l_statistic
from .allocation import AllocationRule
from .constants import UNIT_EXPONENT
from .order_weights import CumulativeWeights, WeightTable, revenue_weights, welfare_weights
from .payment_rules import Floor

__all__ = [
    "ENDPOINT_SPACINGS",
    "FloorStep",
    "MetricWeights",
    "endpoint_gaps",
    "estimate_stratum",
    "floor_step",
    "revenue_estimate",
    "stratum_weights",
    "table_weights",
    "unit_exponent",
    "welfare_estimate",
]

#: Top (and bottom) spacings of the sorted bids averaged to estimate the distance from the
#: extreme bid to the end of the bid distribution.
ENDPOINT_SPACINGS = 5


def unit_exponent(top_bid: float) -> int:
    """A stratum's unit: 0, or frexp's exponent of the largest bid when it lies outside [2**-200, 2**200]."""
    if top_bid > 0 and not 2.0**-UNIT_EXPONENT <= top_bid <= 2.0**UNIT_EXPONENT:
        return math.frexp(top_bid)[1]
    return 0


def endpoint_gaps(sorted_bids: np.ndarray) -> tuple[float, float]:
    """Expected distances from the highest bid to the top of the bid distribution, and from the lowest to its bottom.

    With a bid density that stays positive at an end, the distance from the extreme order
    statistic to the end is one spacing on average, and the mean of the last ``k`` spacings
    ``(b_(N) - b_(N-k)) / k`` estimates it (the endpoint estimator of Robson & Whitlock 1964).
    """
    k = min(ENDPOINT_SPACINGS, sorted_bids.size - 1)
    return (float(sorted_bids[-1] - sorted_bids[-1 - k]) / k, float(sorted_bids[k] - sorted_bids[0]) / k)


@dataclass(frozen=True)
class MetricWeights:
    """One metric's weights on a stratum of ``N`` bids with ``n`` bidders per auction.

    Attributes
    ----------
    increments : callable
        ``increments(lo, hi)``: ``c_i = n [F((i+1)/N) - F(i/N)]`` for ``i = lo .. hi - 1`` (a fresh
        array), for the cumulative weight ``F`` (:class:`~.order_weights.CumulativeWeights`).
    top, bottom, floor_term, floor_slope : float
        The weights' boundary terms, per bidder (:class:`~.order_weights.CumulativeWeights`).
    """

    increments: Callable[[int, int], np.ndarray]
    top: float
    bottom: float
    floor_term: float = 0.0
    floor_slope: float = 0.0


@dataclass(frozen=True)
class FloorStep:
    """The floor step of a stratum: ``Floor(r, q*)`` (``None`` without a floor, or when no bid reaches it).

    Attributes
    ----------
    floor : Floor or None
    n_below : int
        Sub-floor bids: the first ``n_below`` sorted bids.
    """

    floor: Floor | None
    n_below: int

    @property
    def quantile(self) -> float:
        """``q*``, NaN without a floor (or when every bid lies below it)."""
        return np.nan if self.floor is None else self.floor.quantile


def floor_step(sorted_bids: np.ndarray, floor_value: float) -> FloorStep:
    """Estimate the floor's quantile and clamp the sorted bids at the floor, in place (no floor: nothing).

    ``q*`` is the share of sub-floor bids (strict: a bid equal to the floor is eligible); sub-floor
    bids then count as the floor (the order is kept). See :func:`._floor.clamp_at_floor`.
    """
    if not floor_value > 0:
        return FloorStep(None, 0)
    floor, n_below = clamp_at_floor(sorted_bids, floor_value)
    return FloorStep(floor, n_below)


def stratum_weights(rules: Sequence[AllocationRule], mixture: AllocationRule, n_bids: int, *, payment_rule: str,
                    floor: Floor | None) -> tuple[list[CumulativeWeights], list[CumulativeWeights]]:
    """Revenue and welfare weights of every target rule against ``mixture`` on a stratum of ``n_bids`` bids."""
    options = {"payment_rule": payment_rule, "floor": floor}
    return ([revenue_weights(r, mixture, n_bids, **options) for r in rules],
            [welfare_weights(r, mixture, n_bids, **options) for r in rules])


def table_weights(revenue: Sequence[CumulativeWeights], welfare: Sequence[CumulativeWeights], n: int,
                  n_bids: int) -> tuple[list[MetricWeights], list[MetricWeights | None]]:
    """Every metric's :class:`MetricWeights` from one :class:`~.order_weights.WeightTable` of the stratum.

    Welfare weights whose boundary terms are not finite (values not identified at an end of the
    mixture) become ``None``.
    """
    identified = [bool(np.isfinite(w.top) and np.isfinite(w.bottom)) for w in welfare]
    table = WeightTable(list(revenue) + [w for w, ok in zip(welfare, identified) if ok], n_bids)

    def of(row: int, w: CumulativeWeights) -> MetricWeights:
        def increments(lo: int, hi: int) -> np.ndarray:
            inc = np.diff(table.block(row, lo, hi))
            inc *= n
            return inc

        return MetricWeights(increments, float(w.top), float(w.bottom), float(w.floor_term), float(w.floor_slope))

    rows = len(revenue) + np.cumsum(identified) - 1  # welfare metric k's row in the table
    return ([of(k, w) for k, w in enumerate(revenue)],
            [of(int(row), w) if ok else None for row, w, ok in zip(rows, welfare, identified)])


def revenue_estimate(sorted_bids: np.ndarray, n: int, weights: MetricWeights, floor: FloorStep,
                     influence: np.ndarray | None) -> float:
    """A revenue label's estimate per auction and, written into ``influence``, each sorted bid's influence / ``N``.

    ``n (sum_i b_(i) c_i / n + top b_(N) - bottom b_(1) + floor_term)``; the influence function
    of the L-statistic (:func:`._lstatistic.l_statistic`) plus the estimated floor quantile's term
    ``n floor_slope (1{b < r} - q*)``, divided by ``N`` (so its auction sums give the CR0 covariance).
    """
    boundary = (n * weights.top * float(sorted_bids[-1]) - n * weights.bottom * float(sorted_bids[0])
                + n * weights.floor_term)
    est = l_statistic(weights.increments, sorted_bids, influence, block=BLOCK) + boundary
    if influence is not None:
        if floor.floor is not None:
            add_floor_influence(influence, floor.n_below, n * weights.floor_slope, floor.floor.quantile)
        influence *= 1.0 / sorted_bids.size
    return est


def welfare_estimate(sorted_bids: np.ndarray, n: int, weights: MetricWeights) -> float:
    """A welfare label's estimate per auction: the extreme bids moved to the ends of the bid distribution.

    ``b_(N) + gap_top`` and, when the bottom is weighed, ``b_(1) - gap_bottom`` (:func:`endpoint_gaps`).
    No influence function: welfare has no interval (see ``estimate_arms``).
    """
    top_gap, bottom_gap = endpoint_gaps(sorted_bids)
    est = l_statistic(weights.increments, sorted_bids, None, block=BLOCK)
    est += n * weights.top * (float(sorted_bids[-1]) + top_gap) + n * weights.floor_term
    if weights.bottom:  # 0 with a floor (its term replaces the bottom bid's)
        est -= n * weights.bottom * (float(sorted_bids[0]) - bottom_gap)
    return est


def estimate_stratum(sorted_bids: np.ndarray, n: int, revenue: Sequence[MetricWeights],
                     welfare: Sequence[MetricWeights | None], floor: FloorStep, *,
                     influence: np.ndarray | None = None,
                     on_influence: Callable[[int, np.ndarray], None] | None = None) -> np.ndarray:
    """The stratum's estimate of every label: revenue labels, then welfare labels (NaN where not identified).

    Parameters
    ----------
    sorted_bids : ndarray
        The stratum's ``N`` bids, ascending, clamped by :func:`floor_step`, in the stratum's unit.
    n : int
        Bidders per auction.
    revenue, welfare : sequence of MetricWeights
        One per target rule (``None``: welfare not identified).
    floor : FloorStep
    influence : ndarray, optional
        A buffer of at least ``N`` floats for the influence functions (one at a time).
    on_influence : callable, optional
        ``on_influence(k, values)`` receives revenue label ``k``'s influence / ``N`` at each sorted
        bid (a view of ``influence``, overwritten by the next label); without it no influence
        function is computed.

    Returns
    -------
    ndarray
        ``len(revenue) + len(welfare)`` estimates per auction.
    """
    big_n = sorted_bids.size
    out = np.full(len(revenue) + len(welfare), np.nan)
    buffer = None
    if on_influence is not None:
        buffer = influence[:big_n] if influence is not None and influence.size >= big_n else np.empty(big_n)
    for k, w in enumerate(revenue):
        out[k] = revenue_estimate(sorted_bids, n, w, floor, buffer)
        if on_influence is not None:
            on_influence(k, buffer)
    for k, w in enumerate(welfare):
        if w is not None:
            out[len(revenue) + k] = welfare_estimate(sorted_bids, n, w)
    return out
