"""Scale covariates: values that scale with an observed auction-level signal, taken out of the bids.

Model (``docs/method.md``, "Scale covariates"): in auction ``j`` every value is
``exp(gamma . x_j) v~`` with ``v~`` drawn from one distribution, independently of ``x_j``. Without a
floor the first-price and next-price equilibria are homogeneous of degree one in the values, so
every bid of the auction is ``exp(gamma . x_j)`` times the bid of the unscaled equilibrium and

    log b_ij = const + gamma . x_j + log b~_ij,    b~ independent of x.

Per stratum, :func:`fit_scale` estimates ``gamma`` by least squares of the log (effective) bids on
the centred covariates, divides it out of the bids (the homogenised bids ``b exp(-gamma^ . x~)``),
and says how to scale the estimate on homogenised bids back: by the stratum's auction average
``m = mean_j exp(gamma^ . x~_j)``, with the influence of ``gamma^`` added to each bid's influence
(:meth:`ScaleFit.extra_influence`; stacked estimating equations, the delta method). The estimand is
revenue per auction at the stratum's own covariates (conditional on them, as the strata's auction
counts are): no term for new draws of ``x``.

Pure numpy.

References
----------
.. [1] Haile, P. A., Hong, H. & Shum, M. (2003). Nonparametric tests for common values in
   first-price sealed-bid auctions. NBER Working Paper 10105 (title, authors and date checked
   against a copy of the September 2003 draft; the homogenised bids -- bids divided by a fitted
   auction-level index before the inversion -- and the paper number recalled from memory).
.. [2] Newey, W. K. & McFadden, D. (1994). Large sample estimation and hypothesis testing.
   Handbook of Econometrics IV, ch. 36, sec. 6 (two-step estimators: the first step's influence
   carried into the second's; recalled from memory).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import InputError

__all__ = ["ScaleFit", "fit_scale", "homogenized_bids"]


@dataclass(frozen=True)
class ScaleFit:
    """One stratum's fitted scale index and what it takes to undo it.

    Attributes
    ----------
    gamma : ndarray, shape (p,)
        Least-squares slopes of the log bids on the covariates.
    centre : ndarray, shape (p,)
        The stratum's mean covariates (every auction of a stratum has as many bids, so this is
        also the auction mean); ``x~ = x - centre``.
    scale_mean : float
        ``m = mean_j exp(gamma . x~_j)`` over the stratum's auctions: the factor that takes an
        estimate on homogenised bids back to the bids' scale.
    homogenized : ndarray, shape (N,)
        ``b exp(-gamma . x~)``, in the input's order.
    unit_influence : ndarray, shape (N,)
        Per bid, the influence of the fitted ``gamma`` per unit of the homogenised estimate ``T~``:
        ``m1 . H^+ x~ e`` with ``m1 = mean_j x~_j exp(gamma . x~_j)``, ``H = mean x~ x~'`` and ``e``
        the least-squares residual. The estimate ``m T~`` has influence ``m IF~ + T~ unit_influence``
        at each bid.
    """

    gamma: np.ndarray
    centre: np.ndarray
    scale_mean: float
    homogenized: np.ndarray
    unit_influence: np.ndarray

    def extra_influence(self, estimate: float) -> np.ndarray:
        """The influence the scaling adds to a label whose estimate on homogenised bids is ``estimate``."""
        return estimate * self.unit_influence


def fit_scale(bid: np.ndarray, covariates: np.ndarray, *, source: str = "bids") -> ScaleFit:
    """Fit ``log b = const + gamma . x`` on one stratum and homogenise its bids.

    Parameters
    ----------
    bid : ndarray, shape (N,)
        The stratum's (effective) bids, all > 0. Every auction of the stratum must contribute the
        same number of bids (a stratum by number of bidders does), so that means over bids are
        means over auctions.
    covariates : ndarray, shape (N, p)
        Each bid's auction covariates (constant within an auction, finite).
    source : str
        Name of the input in error messages.

    Returns
    -------
    ScaleFit

    Raises
    ------
    InputError
        Shapes that disagree, or a bid that is not > 0 (its log is needed).

    Notes
    -----
    A covariate without spread in the stratum has no slope there (the minimum-norm least-squares
    solution sets it to 0); the estimate does not depend on it, because ``m T~`` is unchanged when
    every ``x~`` moves by a constant (``T~`` is homogeneous of degree one in the bids without a
    floor). The estimate's first-order expansion in ``gamma^ - gamma`` is ``m1 T~`` (``T~``'s own
    derivative ``-E[x~] T~`` vanishes with centred covariates, the index being independent of
    ``b~``), and ``gamma^ - gamma = H^-1 mean(x~ e)`` (ordinary least squares), so the stacked
    influence of ``m T~`` at bid ``i`` of auction ``j`` is ``m IF~_i + T~ m1 . H^-1 x~_j e_i``. The
    estimand conditions on the stratum's covariates (revenue per auction at these auctions' own
    scales, ``mean_j exp(gamma . x_j) R~``); for new draws of ``x`` an auction-level term
    ``(exp(gamma . x~_j) - m) T~`` would join, which bidder clusters cannot carry. Both terms
    have mean zero given ``x`` and are independent across the bids of an auction, so auction and
    bidder clusters carry them alike.

    References
    ----------
    .. [1] Haile, P. A., Hong, H. & Shum, M. (2003). Nonparametric tests for common values in first-price
       sealed-bid auctions. NBER Working Paper 10105 (homogenised bids recalled from memory).
    .. [2] Newey, W. K. & McFadden, D. (1994). Handbook of Econometrics IV, ch. 36, sec. 6.
    """
    b = np.asarray(bid, dtype=float)
    x = np.asarray(covariates, dtype=float)
    if x.ndim == 1:
        x = x[:, None]
    if b.ndim != 1 or x.ndim != 2 or x.shape[0] != b.size or b.size == 0:
        raise InputError(f"{source}: bids and scale covariates must be N and N x p arrays; got {b.shape} and {x.shape}")
    low = np.flatnonzero(~(b > 0))
    if low.size:
        raise InputError(f"{source}: bid {float(b[low[0]])!r} is not > 0; scale covariates need the log of every bid")
    centre = x.mean(axis=0)
    xc = x - centre
    y = np.log(b)
    y -= y.mean()
    gamma, *_ = np.linalg.lstsq(xc, y, rcond=None)
    index = xc @ gamma
    residual = y - index
    scale = np.exp(index)
    m = float(scale.mean())
    m1 = (xc * scale[:, None]).mean(axis=0)
    h_inv = np.linalg.pinv(xc.T @ xc / b.size)
    unit = (xc @ (h_inv @ m1)) * residual
    return ScaleFit(gamma=gamma, centre=centre, scale_mean=m, homogenized=b / scale, unit_influence=unit)


def homogenized_bids(bid: np.ndarray, covariates: np.ndarray, stratum: np.ndarray, *, source: str = "bids") -> np.ndarray:
    """Every bid divided by its stratum's fitted scale index (:func:`fit_scale` per stratum key).

    Parameters
    ----------
    bid : ndarray, shape (N,)
    covariates : ndarray, shape (N, p)
    stratum : ndarray, shape (N,)
        Stratum key of each bid (the number of bidders, or a code of the finer stratum).
    source : str

    Returns
    -------
    ndarray, shape (N,)
        ``b exp(-gamma^_s . (x - centre_s))`` with stratum ``s``'s own fit.
    """
    out = np.empty(np.shape(bid), dtype=float)
    keys = np.asarray(stratum)
    for key in np.unique(keys):
        rows = np.flatnonzero(keys == key)
        out[rows] = fit_scale(bid[rows], covariates[rows], source=source).homogenized
    return out
