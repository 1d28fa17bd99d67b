"""How much the mixture's bids say about a layout that did not run: bounded weights and effective share.

A what-if layout ``y`` is estimated with the same weighted order statistic as an arm, with the
mixture ``x`` of the arms that ran in the denominators (``docs/method.md``, "Layouts that did not
run"). Its weights are bounded when ``h = y' x / x'`` is, which :func:`weights_bounded` reads off
the Bernstein coefficients; the effective share compares the estimate's variance with the variance
the same weights would have if ``y`` itself were the mixture (:func:`effective_share`).

References
----------
.. [1] Myerson, R. (1981). Optimal auction design. Math. Oper. Res. 6(1), 58-73.
.. [2] Serfling, R. (1980). Approximation Theorems of Mathematical Statistics, Wiley, sec. 8.2.
"""

from __future__ import annotations

import numpy as np

from .allocation import AllocationRule
from .constants import MIN_STRATUM_BIDS

__all__ = ["MIN_EFFECTIVE_BIDS", "effective_share", "weights_bounded"]

#: A what-if estimate leaning on fewer effective bids than this (effective share x bids) gets no
#: number: the same bound as a stratum's ``few_bids`` flag, below which intervals under-cover.
MIN_EFFECTIVE_BIDS = MIN_STRATUM_BIDS


def weights_bounded(target: AllocationRule, mixture: AllocationRule, payment_rule: str) -> bool:
    """Whether ``target``'s revenue weights against ``mixture`` are bounded (its revenue is estimable).

    With ``d_j`` the Bernstein coefficients of the derivatives (degree ``n - 2``; ``q^j`` dominates
    near ``q = 0`` for the lowest ``j`` with ``d_j > 0``, near ``q = 1`` for the highest), ``y' / x'``
    stays bounded at the top when the mixture's highest positive coefficient is at least the
    target's, and ``x / x'`` times ``y'`` at the bottom when ``x(0) = 0`` or the mixture's lowest
    positive coefficient is at most the target's. Under ``vcg`` bids are values and every layout's
    weights are bounded.

    Parameters
    ----------
    target, mixture : AllocationRule
        Same number of bidders.
    payment_rule : str
        The rule that ran.

    Returns
    -------
    bool
    """
    if payment_rule == "vcg" or target.n_bidders < 2:
        return True
    dy, dx = target.derivative_coefficients, mixture.derivative_coefficients
    jy, jx = np.flatnonzero(dy > 0), np.flatnonzero(dx > 0)
    if jy.size == 0:  # the layout gives every bidder the same clicks: nothing to recover
        return True
    if jx.size == 0:
        return False
    top_ok = jy[-1] <= jx[-1]
    bottom_ok = mixture.coefficients[0] == 0 or jy[0] >= jx[0]
    return bool(top_ok and bottom_ok)


def effective_share(own_variance: float, variance: float) -> float:
    """``own_variance / variance``: the share of the auctions at which the layout, bid for as the whole
    mixture, would be estimated as precisely (NaN when either is not a positive finite number).

    Parameters
    ----------
    own_variance : float
        Variance of the layout's weights with itself as the mixture, on the same bids.
    variance : float
        Variance of the what-if estimate (weights against the mixture that ran).

    Returns
    -------
    float
    """
    if not (np.isfinite(own_variance) and np.isfinite(variance) and own_variance > 0 and variance > 0):
        return float("nan")
    return float(own_variance / variance)
