"""Weights of the order-statistic estimator (cumulative form, closed).

For the mixture rule ``x`` that was run and a target rule ``y``, the expected payment of one
bidder under ``y`` is (Myerson's formula with the first-price inversion integrated by parts)

    P[y] = int_0^1 b(q) omega(q) dq - b(0) g(0),
    g(q) = (1 - q) y'(q) x(q) / x'(q),   omega = (1 - q) y' - g',

with cumulative weight ``Omega(q) = (1-q) y(q) - y(0) + Y(q) - g(q) + g(0)``. Expected welfare
per bidder, ``int v(q) y(q) dq``, is in the same form with ``h(q) = y(q) x(q) / x'(q)``:

    W[y] = int_0^1 b(q) psi(q) dq + b(1) h(1) - b(0) h(0),   Psi(q) = Y(q) - h(q) + h(0).

On the empirical bid quantile function these integrals become weighted sums of the sorted bids,
with weight ``Omega(i/N) - Omega((i-1)/N)`` on the i-th smallest. ``Omega`` and ``Psi`` are
evaluated exactly on a grid of at most ``GRID_INTERVALS + 1`` points and, for larger samples,
interpolated by a cubic spline (error below 1e-10 up to n = 60; see the tests).
"""

from __future__ import annotations

from collections import OrderedDict
from dataclasses import dataclass

import numpy as np

from .allocation import AllocationRule, derivative_ratio
from .errors import InputError
from .payment_rules import Floor, check_payment_rule, floor_terms, gsp_cumulative_weights, vcg_cumulative_weights

__all__ = ["CumulativeWeights", "Floor", "WeightTable", "revenue_weights", "spline_coefficients", "welfare_weights",
           "GRID_INTERVALS"]

#: Exact evaluations of the cumulative weight per stratum before the spline takes over.
GRID_INTERVALS = 2**14


@dataclass(frozen=True)
class CumulativeWeights:
    """Cumulative weight function of an order-statistic estimator and its boundary terms.

    The estimate (per bidder) from sorted bids ``b_(1) <= ... <= b_(N)`` is
    ``sum_i b_(i) [F(i/N) - F((i-1)/N)] + top * b_(N) - bottom * b_(1)``.

    With a floor ``r`` (weights built with ``floor=Floor(r, q*)``) every bid below ``r`` counts
    as ``r`` in that sum (``b_(i)`` replaced by ``max(b_(i), r)``), ``bottom`` is 0 and
    ``floor_term`` is added; the influence function of each bid ``b`` gains
    ``floor_slope * (1{b < r} - q*)`` because ``q*`` is estimated by the share of sub-floor bids.

    Attributes
    ----------
    grid : ndarray
        Quantiles where ``values`` were computed exactly.
    values : ndarray
        Cumulative weight on ``grid`` (0 at q = 0).
    top, bottom : float
        Coefficients of the largest and smallest bid (NaN when not identified).
    floor_term : float
        The floor's boundary term, per bidder (0 without a floor).
    floor_slope : float
        Its derivative in the floor's quantile ``q*``, per bidder (0 without a floor).
    """

    grid: np.ndarray
    values: np.ndarray
    top: float
    bottom: float
    floor_term: float = 0.0
    floor_slope: float = 0.0

    def at(self, q: np.ndarray) -> np.ndarray:
        """Cumulative weight at quantiles ``q`` (exact on the grid, cubic spline between)."""
        from scipy.interpolate import CubicSpline  # the checks' and the study's path, not the estimate's

        spline = CubicSpline(self.grid, self.values)
        return spline(q)

    def increments(self, n_bids: int, *, grid: np.ndarray | None = None, out: np.ndarray | None = None) -> np.ndarray:
        """Weights ``F(i/N) - F((i-1)/N)`` for i = 1..N.

        ``grid``, when given, must be ``np.arange(n_bids + 1) / n_bids`` (callers that need the
        increments of several weight functions compute it once); ``out`` is an optional buffer
        of length N for the result.
        """
        if n_bids + 1 <= self.grid.size and self.grid.size == n_bids + 1:
            cum = self.values
        else:
            cum = self.at(np.arange(n_bids + 1) / n_bids if grid is None else grid)
        return np.subtract(cum[1:], cum[:-1], out=out)  # np.diff, into ``out``


def spline_coefficients(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """The coefficients ``c`` (shape ``(4, K, ...)``) of ``scipy.interpolate.CubicSpline(x, y)`` (not-a-knot).

    Parameters
    ----------
    x : ndarray, shape (K + 1,)
        Strictly increasing knots.
    y : ndarray, shape (K + 1, ...)
        Values at the knots (one spline per trailing index).

    Returns
    -------
    ndarray
        ``c[p, j]`` multiplies ``(t - x_j)**(3 - p)`` on ``[x_j, x_(j+1)]``, as ``scipy.interpolate.PPoly``.

    Notes
    -----
    The slopes solve the tridiagonal system of the not-a-knot spline with ``scipy.linalg.solve_banded``,
    built and solved exactly as ``CubicSpline`` does it (de Boor 2001, ch. IV), so the coefficients are
    the same numbers; what it saves is importing ``scipy.interpolate`` (a third of a second of every
    ``counterbid estimate``). Fewer than 4 knots or a value that is not finite: ``CubicSpline`` itself.

    References
    ----------
    .. [1] de Boor, C. (2001). A Practical Guide to Splines, revised ed., Springer, ch. IV.
    """
    n = x.size
    if n < 4 or not np.all(np.isfinite(y)):
        from scipy.interpolate import CubicSpline

        return CubicSpline(x, y, axis=0).c
    from scipy.linalg import solve_banded

    dx = np.diff(x)
    dxr = dx.reshape((n - 1,) + (1,) * (y.ndim - 1))
    slope = np.diff(y, axis=0) / dxr
    a = np.zeros((3, n))  # banded: upper diagonal, diagonal, lower diagonal
    b = np.empty(y.shape)
    a[1, 1:-1] = 2 * (dx[:-1] + dx[1:])
    a[0, 2:] = dx[:-1]
    a[-1, :-2] = dx[1:]
    b[1:-1] = 3 * (dxr[1:] * slope[:-1] + dxr[:-1] * slope[1:])
    d = x[2] - x[0]  # not-a-knot at the start: the first two pieces are one cubic
    a[1, 0], a[0, 1] = dx[1], d
    b[0] = ((dxr[0] + 2 * d) * dxr[1] * slope[0] + dxr[0] ** 2 * slope[1]) / d
    d = x[-1] - x[-3]  # and at the end
    a[1, -1], a[-1, -2] = dx[-2], d
    b[-1] = (dxr[-1] ** 2 * slope[-2] + (2 * d + dxr[-1]) * dxr[-2] * slope[-1]) / d
    s = solve_banded((1, 1), a, b.reshape(n, -1), overwrite_ab=True, overwrite_b=True,
                     check_finite=False).reshape(y.shape)
    t = (s[:-1] + s[1:] - 2 * slope) / dxr  # the Hermite form of each piece
    return np.stack((t / dxr, (slope - s[:-1]) / dxr - t, s[:-1], y[:-1]))


class WeightTable:
    """The cumulative weights of several metrics on one shared grid, evaluated block by block.

    The estimator needs ``F_k(i/N)`` for every metric ``k`` at every ``i = 0..N``. Building one
    piecewise-cubic interpolant for all metrics (:func:`spline_coefficients`: the coefficients of
    ``scipy.interpolate.CubicSpline`` along axis 0, the same spline :meth:`CumulativeWeights.at` builds) and evaluating it on a block of
    consecutive points keeps the work in cache. The interval of ``i/N`` on the uniform grid
    ``j/K`` is ``floor(i K / N)``: consecutive points fall into runs of the same interval whose
    lengths follow from integer arithmetic, so the pieces' coefficients are repeated rather than
    searched for. Each piece is evaluated in the local variable ``i/N - j/K`` (Horner's rule),
    as ``scipy.interpolate.PPoly`` does.

    Parameters
    ----------
    weights : sequence of CumulativeWeights
        Weights computed on the same grid (``revenue_weights`` / ``welfare_weights`` with the
        same ``n_bids``).
    n_bids : int
        Sample size ``N`` of the stratum. When the grid is exactly ``i/N`` the exact values are
        returned; otherwise the spline.
    """

    def __init__(self, weights, n_bids: int):
        if len(weights) == 0:
            raise ValueError("WeightTable needs at least one set of weights")
        grid = weights[0].grid
        if any(w.grid.shape != grid.shape or not np.array_equal(w.grid, grid) for w in weights):
            raise ValueError("WeightTable: all weights must share one grid")
        self.n_bids = int(n_bids)
        self.intervals = grid.size - 1
        values = np.stack([w.values for w in weights])  # (M, K+1)
        self.exact = grid.size == self.n_bids + 1
        if self.exact:
            self.values = values
            self.coefficients = None
        else:
            if not np.array_equal(grid, np.arange(grid.size) / self.intervals):
                raise ValueError("WeightTable: the spline path needs the uniform grid j/K")
            # PPoly coefficients (4, K, M) -> per metric, per power: (M, 4, K), contiguous rows.
            self.coefficients = np.ascontiguousarray(np.moveaxis(spline_coefficients(grid, values.T), 2, 0))
            # First point i of interval j: ceil(j N / K); the last interval also holds i = N.
            j = np.arange(self.intervals + 1, dtype=np.int64)
            self._starts = (j * self.n_bids + self.intervals - 1) // self.intervals
            self._starts[-1] = self.n_bids + 1
            self._left = j[:-1] / self.intervals  # the grid's knots, as PPoly's x

    def block(self, k: int, lo: int, hi: int) -> np.ndarray:
        """``F_k(i/N)`` for ``i = lo..hi`` (inclusive) of metric ``k``."""
        if self.exact:
            return self.values[k, lo:hi + 1]
        j0, j1 = self._interval(lo), self._interval(hi)
        edges = np.clip(self._starts[j0:j1 + 2], lo, hi + 1)
        edges[0], edges[-1] = lo, hi + 1
        counts = np.diff(edges)
        t = np.arange(lo, hi + 1) / self.n_bids
        t -= np.repeat(self._left[j0:j1 + 1], counts)
        c = self.coefficients[k]
        out = np.repeat(c[0, j0:j1 + 1], counts)
        for power in (1, 2, 3):
            out *= t
            out += np.repeat(c[power, j0:j1 + 1], counts)
        return out

    def _interval(self, i: int) -> int:
        return min(i * self.intervals // self.n_bids, self.intervals - 1)


#: gsp weights cost a quadrature per grid interval (0.3-0.8 s per arm and metric on 2**14 intervals):
#: the last few are kept, keyed by (target weights, mixture weights, bidders, grid size, metric).
_GSP_CACHE: OrderedDict = OrderedDict()
_GSP_CACHE_SIZE = 48


def _gsp_weights(target: AllocationRule, mixture: AllocationRule, q: np.ndarray, metric: str):
    """:func:`gsp_cumulative_weights` on the uniform grid ``q``, cached (the arrays are read-only)."""
    key = (target.position_weights.tobytes(), mixture.position_weights.tobytes(), mixture.n_bidders, q.size, metric)
    hit = _GSP_CACHE.get(key)
    if hit is not None:
        _GSP_CACHE.move_to_end(key)
        return hit
    values, beta = gsp_cumulative_weights(target, mixture, q, metric=metric)
    values.setflags(write=False)
    _GSP_CACHE[key] = (values, beta)
    while len(_GSP_CACHE) > _GSP_CACHE_SIZE:
        _GSP_CACHE.popitem(last=False)
    return values, beta


def _grid(n_bids: int | None) -> np.ndarray:
    k = GRID_INTERVALS if n_bids is None else min(GRID_INTERVALS, int(n_bids))
    return np.arange(k + 1) / k


def _floor_of(floor) -> Floor | None:
    if floor is None or isinstance(floor, Floor):
        return floor
    raise InputError("`floor` must be a Floor(value, quantile) or None")


def revenue_weights(
    target: AllocationRule,
    mixture: AllocationRule,
    n_bids: int | None = None,
    *,
    payment_rule: str = "first_price",
    floor: Floor | None = None,
) -> CumulativeWeights:
    """Cumulative weights ``Omega`` of the revenue estimator for ``target`` given bids under ``mixture``.

    Parameters
    ----------
    target : AllocationRule
        The arm ``y`` whose revenue is wanted.
    mixture : AllocationRule
        The rule ``x`` the bids answer (share-weighted mixture of all arms).
    n_bids : int, optional
        Sample size; when at most ``GRID_INTERVALS`` the grid is exactly ``i / n_bids``.
    payment_rule : {'first_price', 'gsp', 'vcg'}, optional
        Payment rule of the auction that ran (it decides how bids map to values); the target's
        own payment rule does not matter (revenue equivalence).
    floor : Floor, optional
        Floor shared by the arms: its value ``r`` and quantile ``q*``. Sub-floor bids then count
        as ``r`` in the weighted sum, and ``floor_term`` / ``floor_slope`` are set.

    Returns
    -------
    CumulativeWeights
        Per-bidder weights; multiply the estimate by ``n`` for revenue per auction.

    References
    ----------
    .. [1] Myerson, R. (1981). Optimal auction design. Math. Oper. Res. 6(1), 58-73.
    .. [2] Gomes, R. and Sweeney, K. (2014). Bayes-Nash equilibria of the generalized second-price
       auction. Games Econ. Behav. 86, 421-437.
    """
    check_payment_rule(payment_rule)
    floor = _floor_of(floor)
    q = _grid(n_bids)
    if payment_rule == "gsp":
        omega, beta = _gsp_weights(target, mixture, q, "revenue")
        return _with_floor(target, q, omega, 0.0, beta, floor, "revenue")
    if payment_rule == "vcg":
        return _with_floor(target, q, vcg_cumulative_weights(target, q, metric="revenue"), 0.0, 0.0, floor, "revenue")
    y = target.value(q)
    big_y = target.integral(q)
    g = (1.0 - q) * derivative_ratio(target, mixture, q) * mixture.value(q)
    g[-1] = 0.0  # (1 - q) factor; the ratio stays bounded
    g0 = float(g[0])
    omega = (1.0 - q) * y - y[0] + big_y - g + g0
    omega[0] = 0.0
    if floor is not None:
        return _with_floor(target, q, omega, 0.0, g0, floor, "revenue")
    return CumulativeWeights(grid=q, values=omega, top=0.0, bottom=g0)


def _with_floor(target, q, values, top, beta, floor, metric) -> CumulativeWeights:
    """Weights of a rule whose bottom coefficient is ``beta``: no floor -> ``bottom``; floor -> terms."""
    if floor is None:  # gsp and vcg have no bottom term without a floor (NaN: not identified)
        return CumulativeWeights(grid=q, values=values, top=top, bottom=0.0 if np.isfinite(beta) else np.nan)
    if not np.isfinite(beta):
        return CumulativeWeights(grid=q, values=values, top=top, bottom=np.nan, floor_term=np.nan, floor_slope=np.nan)
    term, slope = floor_terms(target, floor, beta, metric=metric)
    return CumulativeWeights(grid=q, values=values, top=top, bottom=0.0, floor_term=term, floor_slope=slope)


def welfare_weights(
    target: AllocationRule,
    mixture: AllocationRule,
    n_bids: int | None = None,
    *,
    payment_rule: str = "first_price",
    floor: Floor | None = None,
) -> CumulativeWeights:
    """Cumulative weights ``Psi`` of the welfare estimator (expected value of clicks won).

    Values are identified from bids only where the mixture's rule is strictly increasing; at the
    top that needs ``w_1 > w_2`` in the mixture, at the bottom ``w_n = 0`` or ``w_{n-1} > w_n``.
    Otherwise the boundary coefficients are NaN and so is the estimate. Under ``vcg`` bids are
    values and welfare is always identified. ``payment_rule`` and ``floor`` as in
    :func:`revenue_weights`.
    """
    check_payment_rule(payment_rule)
    floor = _floor_of(floor)
    q = _grid(n_bids)
    if payment_rule == "gsp":
        psi, beta = _gsp_weights(target, mixture, q, "welfare")
        top = 0.0 if np.isfinite(beta) else np.nan
        return _with_floor(target, q, psi, top, beta, floor, "welfare")
    if payment_rule == "vcg":
        return _with_floor(target, q, vcg_cumulative_weights(target, q, metric="welfare"), 0.0, 0.0, floor, "welfare")
    big_y = target.integral(q)
    y = target.value(q)
    d = mixture.derivative_coefficients
    c = mixture.coefficients
    if d.size == 0:  # a single bidder: nothing is identified
        nan = np.full(q.shape, np.nan)
        return CumulativeWeights(grid=q, values=nan, top=np.nan, bottom=np.nan)
    # x / x' in log space (both are non-negative Bernstein polynomials).
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.exp(mixture.log_value(q) - mixture.log_derivative(q))
    h = y * ratio
    top_ok = d[-1] > 0
    bottom_ok = c[0] == 0 or d[0] > 0
    h0 = 0.0 if c[0] == 0 else (float(y[0] * c[0] / (mixture.n_bidders - 1) / d[0]) if bottom_ok else np.nan)
    h1 = float(y[-1] * c[-1] / ((mixture.n_bidders - 1) * d[-1])) if top_ok else np.nan
    h[0], h[-1] = h0, h1
    psi = big_y - h + h0
    psi[0] = 0.0
    if floor is not None:
        return _with_floor(target, q, psi, h1, h0, floor, "welfare")
    return CumulativeWeights(grid=q, values=psi, top=h1, bottom=h0)
