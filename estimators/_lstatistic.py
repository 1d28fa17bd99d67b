"""The one implementation of the weighted order statistic and its influence function.

``estimate_arms`` (per stratum and metric, weights from a :class:`~.order_weights.WeightTable`)
and the Monte Carlo study (weights cached per sample size) both call :func:`l_statistic`; the
tests check it against the plain, unblocked formula.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

__all__ = ["BLOCK", "l_statistic"]

#: Bids per block of the fused weight / influence pass (a few arrays of this length fit in L2).
BLOCK = 2**16


def _dot(x: np.ndarray, y: np.ndarray) -> float:
    """``sum_i x_i y_i`` in this thread (numpy's own SIMD loop, not BLAS).

    A block's dot product is too small to gain from BLAS threads, and on a machine whose cores
    are busy their start and spin cost many times the product itself.
    """
    return float(np.einsum("i,i->", x, y))


def l_statistic(increments: Callable[[int, int], np.ndarray], sorted_bids: np.ndarray, influence: np.ndarray | None,
                *, block: int = BLOCK) -> float:
    """``sum_i b_(i) c_i`` and, written into ``influence``, its influence function at each sorted bid.

    Parameters
    ----------
    increments : callable
        ``increments(lo, hi)`` returns the weights ``c_i`` for ``i = lo .. hi - 1`` (0-based,
        ``c_i = n [F((i+1)/N) - F(i/N)]`` for cumulative weight ``F``); a fresh array the
        function may overwrite.
    sorted_bids : ndarray
        The ``N`` bids in ascending order.
    influence : ndarray or None
        Length ``N``; overwritten with the influence function (not divided by ``N``). ``None``:
        the estimate only.
    block : int
        Bids per block.

    Returns
    -------
    float
        The estimate ``sum_i b_(i) c_i`` (boundary terms are the caller's).

    Notes
    -----
    The influence function of this L-statistic at the i-th smallest bid is
    ``IF_i = sum_j a_j j/N - sum_{j >= i} a_j`` with ``a_j = D_j J(j/N)``, gaps
    ``D_j = b_(j+1) - b_(j)`` and the weight density ``J`` at the gaps, ``J(j/N) ~ N (c_j +
    c_(j+1)) / 2``. Written as ``IF_i = (sum_j a_j j/N - sum_j a_j) + sum_{j < i} a_j`` it is a
    forward prefix sum, computed block by block with a running carry, so nothing of length N is
    allocated here.

    References
    ----------
    .. [1] Serfling, R. (1980). Approximation Theorems of Mathematical Statistics, Wiley, sec. 8.2.
    """
    big_n = sorted_bids.size
    half_n = 0.5 * big_n
    estimate = centre = carry = 0.0
    if influence is None:
        for lo in range(0, big_n, block):
            hi = min(big_n, lo + block)
            estimate += _dot(sorted_bids[lo:hi], increments(lo, hi))
        return estimate
    for lo in range(0, big_n, block):
        hi = min(big_n, lo + block)  # bids lo..hi-1 of this block
        last = min(hi + 1, big_n)  # increments lo..last-1: one beyond the block for a_(hi-1)
        inc = increments(lo, last)
        estimate += _dot(sorted_bids[lo:hi], inc[: hi - lo])
        top = min(hi, big_n - 1)  # gaps a_j, j = lo..top-1 (there are N - 1 in all)
        a = np.add(inc[: top - lo], inc[1 : top - lo + 1])
        a *= half_n
        a *= np.diff(sorted_bids[lo : top + 1])
        centre += _dot(a, np.arange(lo + 1, top + 1, dtype=np.float64)) / big_n
        out = influence[lo:hi]
        out[0] = carry
        np.cumsum(a[: hi - lo - 1], out=out[1:])
        out[1:] += carry
        carry += float(a.sum())
    influence += centre - carry
    return estimate
