"""Payment rules of the auction that ran, a shared floor, and per-click prices.

Revenue equivalence (Myerson 1981): the revenue of an arm ``y`` run alone depends on its
allocation rule and floor only, never on its payment rule,

    P[y] = r (1 - q*) y(q*) + int_{q*}^1 (1 - q) v(q) y'(q) dq,     q* = F(r),

per bidder (``r`` the floor, ``q*`` its quantile; ``r = q* = 0`` without a floor). What the
payment rule of the auction that *ran* decides is how the bids of the mixture ``x`` map to values
``v = p' / x'`` (``p`` the interim payment). For the three rules here ``p'`` is linear in the bid
quantile function, so every revenue and welfare estimate stays a weighted sum of order statistics:

* ``first_price``: ``p = b x``;
* ``vcg``: bids are values, ``v = b``;
* ``gsp`` (next-lower bid per click): with the mixture's position weights ``W_k`` and
  ``c_k = C(n-1, k-1)``, ``p(q) = sum_k W_k c_k (1-q)^(k-1) [r q*^(n-k) + (n-k) int_{q*}^q b(s)
  s^(n-k-1) ds]``. Integrating ``int h p'`` (``h = (1-q) y'/x'`` for revenue, ``y/x'`` for welfare)
  and swapping the order of integration gives the weight ``omega`` whose antiderivative is

      Omega(q) = int_0^q h x' + W_n (n-1) H_n(0) - sum_{k=2..n} W_k c_k (k-1) q^(n-k) H_k(q),
      H_k(q) = int_q^1 h(s) (1-s)^(k-2) ds.

  ``H_k`` is evaluated by Gauss-Legendre quadrature on every interval of the grid and summed
  from the top, so ``Omega`` is exact to rounding on the grid.

The floor enters through bids *clamped at the floor*: with ``L_c = int_0^1 max(Q(u), r) dOmega(u)``
(``Q`` the bid quantile function; sub-floor bids count as ``r``) every rule's estimate is

    P = L_c + top * b_max + r [a(q*) - A(q*) - beta],

with ``a(q*) = (1 - q*) y(q*)`` for revenue and 0 for welfare, ``A(q) = int_0^q h x'`` and the rule's
bottom coefficient ``beta`` (first price ``h(0) x(0)``, gsp ``W_n (n-1) H_n(0)``, vcg 0). Its
derivative in ``q*`` (bids held fixed) is ``-r y(q*)`` for every rule and both metrics; the
estimated ``q*`` (share of sub-floor bids) adds ``-r y(q*) (1{b < r} - q*)`` to the influence
function of each bid.

References
----------
.. [1] Myerson, R. (1981). Optimal auction design. Math. Oper. Res. 6(1), 58-73.
.. [2] Vickrey, W. (1961). Counterspeculation, auctions, and competitive sealed tenders.
   J. Finance 16(1), 8-37.
.. [3] Edelman, B., Ostrovsky, M. and Schwarz, M. (2007). Internet advertising and the generalized
   second-price auction. Amer. Econ. Rev. 97(1), 242-259.
.. [4] Varian, H. (2007). Position auctions. Int. J. Ind. Organ. 25(6), 1163-1178.
.. [5] Gomes, R. and Sweeney, K. (2014). Bayes-Nash equilibria of the generalized second-price
   auction. Games Econ. Behav. 86, 421-437.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from .allocation import AllocationRule, derivative_ratio
from .errors import InputError

__all__ = [
    "PAYMENT_RULES",
    "Floor",
    "check_payment_rule",
    "gsp_cumulative_weights",
    "vcg_cumulative_weights",
    "floor_terms",
    "per_click_prices",
]

#: Payment rules of the auction that ran.
PAYMENT_RULES = ("first_price", "gsp", "vcg")

_NODES, _NODE_WEIGHTS = np.polynomial.legendre.leggauss(10)


def check_payment_rule(payment_rule: str) -> str:
    """Return ``payment_rule`` if it is one of :data:`PAYMENT_RULES`, else raise ``InputError``."""
    if payment_rule not in PAYMENT_RULES:
        raise InputError(f"`payment_rule` must be one of {', '.join(PAYMENT_RULES)}; got {payment_rule!r}")
    return payment_rule


@dataclass(frozen=True)
class Floor:
    """A floor (reserve) shared by all arms, per click, in (effective) bid units.

    Attributes
    ----------
    value : float
        The floor ``r`` (> 0). Bids below it are ineligible.
    quantile : float
        Its quantile ``q* = F(r)`` in [0, 1]: in data, the share of sub-floor bids (1: no bid
        reaches the floor, and every estimate built on it is 0; docs/method.md).
    """

    value: float
    quantile: float

    def __post_init__(self):
        r, qs = float(self.value), float(self.quantile)
        if not np.isfinite(r) or r <= 0:
            raise InputError(f"`floor` must be a finite number > 0; got {self.value!r}")
        if not (0.0 <= qs <= 1.0):
            raise InputError(f"the floor's quantile must lie in [0, 1]; got {self.quantile!r}")


def _nodes(grid: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    lo, hi = grid[:-1, None], grid[1:, None]
    half = (hi - lo) / 2
    return lo + half * (_NODES + 1), half * _NODE_WEIGHTS


def _upper_integrals(h_of_q, grid: np.ndarray, n: int, *, block: int = 2048) -> np.ndarray:
    """``H_k(q_j) = int_{q_j}^1 h(s) (1-s)^(k-2) ds`` for k = 2..n on ``grid``; shape (K+1, n-1)."""
    powers = np.arange(n - 1)  # k - 2
    pieces = np.empty((grid.size - 1, n - 1))
    for lo in range(0, grid.size - 1, block):
        hi = min(grid.size - 1, lo + block)
        r, wts = _nodes(grid[lo:hi + 1])
        hw = wts * h_of_q(r.ravel()).reshape(r.shape)  # (B, m)
        with np.errstate(divide="ignore"):
            log1m = np.log1p(-r)
        basis = np.exp(log1m[..., None] * powers)  # (B, m, n-1); 0**0 = 1 through exp(0)
        pieces[lo:hi] = np.einsum("bm,bmk->bk", hw, basis)
    upper = np.zeros((grid.size, n - 1))
    upper[:-1] = np.cumsum(pieces[::-1], axis=0)[::-1]
    return upper


def gsp_cumulative_weights(target: AllocationRule, mixture: AllocationRule, grid: np.ndarray, *, metric: str):
    """Cumulative weight ``Omega`` of the generalized-second-price inversion on ``grid``.

    Parameters
    ----------
    target, mixture : AllocationRule
        Arm ``y`` whose revenue/welfare is wanted and the mixture ``x`` the bids answer.
    grid : ndarray
        Increasing quantiles from 0 to 1.
    metric : {'revenue', 'welfare'}

    Returns
    -------
    values : ndarray
        ``Omega`` on ``grid`` (0 at q = 0); NaN where welfare is not identified.
    bottom : float
        ``beta = W_n (n-1) H_n(0)``, the coefficient of the price paid by the lowest bidder
        (enters only with a floor).

    References
    ----------
    .. [1] Gomes, R. and Sweeney, K. (2014). Bayes-Nash equilibria of the generalized second-price
       auction. Games Econ. Behav. 86, 421-437.
    """
    n = mixture.n_bidders
    if n < 2:
        nan = np.full(grid.shape, np.nan)
        return nan, np.nan
    y = target.value(grid)
    big_y = target.integral(grid)
    if metric == "revenue":
        def h_of_q(q):
            return (1.0 - q) * derivative_ratio(target, mixture, q)
        a = (1.0 - grid) * y - y[0] + big_y  # int_0^q (1-s) y'
    elif metric == "welfare":
        if not _welfare_identified(mixture):
            nan = np.full(grid.shape, np.nan)
            return nan, np.nan

        def h_of_q(q):
            with np.errstate(divide="ignore", invalid="ignore"):
                out = np.exp(target.log_value(q) - mixture.log_derivative(q))
            return np.where(np.isfinite(out), out, 0.0)
        a = big_y  # int_0^q y
    else:
        raise InputError(f"`metric` must be 'revenue' or 'welfare'; got {metric!r}")
    upper = _upper_integrals(h_of_q, grid, n)  # columns k = 2..n
    k = np.arange(2, n + 1)
    w = mixture.position_weights
    coef = w[k - 1] * special.comb(n - 1, k - 1) * (k - 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        q_pow = np.exp(np.outer(np.log(grid), n - k))  # q^(n-k), 0 at q = 0 for k < n
    q_pow[:, -1] = 1.0  # k = n: q^0
    s_all = (q_pow * upper) @ coef
    beta = float(w[n - 1] * (n - 1) * upper[0, -1])
    omega = a + beta - s_all
    omega[0] = 0.0
    return omega, beta


def _welfare_identified(mixture: AllocationRule) -> bool:
    d = mixture.derivative_coefficients
    c = mixture.coefficients
    if d.size == 0:
        return False
    return bool(d[-1] > 0 and (c[0] == 0 or d[0] > 0))


def vcg_cumulative_weights(target: AllocationRule, grid: np.ndarray, *, metric: str) -> np.ndarray:
    """Cumulative weight under truthful (VCG) prices, where bids are values.

    Revenue: ``int_0^q (1-s) y'(s) ds = (1-q) y(q) - y(0) + Y(q)``; welfare: ``Y(q)``.

    References
    ----------
    .. [1] Vickrey, W. (1961). Counterspeculation, auctions, and competitive sealed tenders.
       J. Finance 16(1), 8-37.
    """
    big_y = target.integral(grid)
    if metric == "welfare":
        out = big_y.copy()
    elif metric == "revenue":
        y = target.value(grid)
        out = (1.0 - grid) * y - y[0] + big_y
    else:
        raise InputError(f"`metric` must be 'revenue' or 'welfare'; got {metric!r}")
    out[0] = 0.0
    return out


def floor_terms(target: AllocationRule, floor: Floor, bottom: float, *, metric: str) -> tuple[float, float]:
    """The floor's boundary term and its derivative in ``q*``, per bidder.

    The estimate is ``sum_i max(b_(i), r) [Omega(i/N) - Omega((i-1)/N)] + top * b_(N) + term``.

    Parameters
    ----------
    target : AllocationRule
        The arm ``y``.
    floor : Floor
        Floor value ``r`` and quantile ``q*``.
    bottom : float
        The rule's bottom coefficient ``beta`` (first price ``h(0) x(0)``; gsp ``W_n (n-1) H_n(0)``;
        vcg 0).
    metric : {'revenue', 'welfare'}

    Returns
    -------
    term : float
        ``r [a(q*) - A(q*) - beta]``: revenue ``r [y(0) - Y(q*) - beta]``, welfare
        ``-r [Y(q*) + beta]``.
    slope : float
        ``d term / d q* = -r y(q*)``; the influence function of each bid gains
        ``slope * (1{b < r} - q*)``.

    References
    ----------
    .. [1] Myerson, R. (1981). Optimal auction design. Math. Oper. Res. 6(1), 58-73.
    """
    r, qs = float(floor.value), float(floor.quantile)
    y_qs = float(target.value(qs))
    big_y_qs = float(target.integral(qs))
    if metric == "revenue":
        term = r * (float(target.value(0.0)) - big_y_qs - bottom)
    elif metric == "welfare":
        term = -r * (big_y_qs + bottom)
    else:
        raise InputError(f"`metric` must be 'revenue' or 'welfare'; got {metric!r}")
    return term, -r * y_qs


def per_click_prices(auction, effective_bid, arm, arm_weights, *, payment_rule: str, floor: float = 0.0) -> np.ndarray:
    """Per-click price of every bid in effective-bid units, priced by the rule that ran.

    Within each auction, bids are ranked by effective bid (``bid * quality``); bids below the
    floor are ineligible (price NaN). With ``e'_j`` the effective bid of the eligible bidder at
    rank ``j``, or the floor when there is none, the bidder at rank ``k`` pays per click:

    * ``first_price``: its own effective bid;
    * ``gsp``: ``e'_{k+1}`` (the next-lower eligible bid, or the floor);
    * ``vcg``: ``sum_{j >= k} (w_j - w_{j+1}) e'_{j+1} / w_k`` (the externality it imposes on the
      bidders below, per click; ``w`` the arm's position weights).

    Bids at positions with ``w_k = 0`` get price 0. A bid's price in currency per click is its
    effective price divided by its quality; its expected payment per auction is ``w_k`` times the
    effective price (clicks ``w_k * quality`` times the currency price).

    Parameters
    ----------
    auction : array of int
        Auction of each bid.
    effective_bid : array of float
        ``bid * quality`` (or the bid when there is no quality factor).
    arm : array of int
        Index of the arm that ran in the bid's auction.
    arm_weights : array, shape (arms, positions)
        Position weights of each arm, top first; positions beyond weigh 0.
    payment_rule : {'first_price', 'gsp', 'vcg'}
    floor : float
        Floor in effective-bid units (0: none).

    Returns
    -------
    ndarray
        Per-click effective price, aligned with the input; NaN for sub-floor bids.

    References
    ----------
    .. [1] Edelman, B., Ostrovsky, M. and Schwarz, M. (2007). Internet advertising and the
       generalized second-price auction. Amer. Econ. Rev. 97(1), 242-259.
    .. [2] Varian, H. (2007). Position auctions. Int. J. Ind. Organ. 25(6), 1163-1178.
    """
    check_payment_rule(payment_rule)
    auction = np.asarray(auction)
    e = np.asarray(effective_bid, dtype=float)
    arm = np.asarray(arm)
    weights = np.asarray(arm_weights, dtype=float)
    order = np.lexsort((-e, auction))
    a_s, e_s, arm_s = auction[order], e[order], arm[order]
    start = np.r_[True, a_s[1:] != a_s[:-1]]
    group_start = np.flatnonzero(start)
    group = np.cumsum(start) - 1
    rank = np.arange(e_s.size) - group_start[group]  # 0 = top
    eligible = e_s >= floor
    # e'_{rank+1}: the next bid in the same auction if eligible, else the floor.
    nxt = np.full(e_s.size, float(floor))
    same = np.r_[a_s[1:] == a_s[:-1], False]
    nxt_ok = same & np.r_[eligible[1:], False]
    nxt[nxt_ok] = e_s[1:][nxt_ok[:-1]]
    padded = np.zeros((weights.shape[0], max(weights.shape[1], int(rank.max()) + 2)))
    padded[:, : weights.shape[1]] = weights
    w_k = padded[arm_s, rank]
    if payment_rule == "first_price":
        price = e_s.copy()
    elif payment_rule == "gsp":
        price = nxt
    else:
        # Eligible bidders form a prefix of each auction's ranking; below the last eligible bidder
        # e' is the floor at every rank, so sum_{j >= last} (w_j - w_{j+1}) floor = w_last floor.
        term = np.where(eligible, (w_k - padded[arm_s, rank + 1]) * nxt, 0.0)
        # suffix sums of ``term`` within each eligible prefix
        csum = np.cumsum(term[::-1])[::-1]
        end = np.r_[group_start[1:], e_s.size]  # one past each auction
        after = np.r_[csum, 0.0][end[group]]
        suffix = csum - after
        # the ranks past the last eligible bidder (or the auction's size) still weigh w_j - w_{j+1}
        # against the floor: add floor * w_{m+1} where m is the last eligible rank + 1 (0-based: m)
        n_eligible = np.bincount(group, weights=eligible.astype(float)).astype(np.int64)
        m = n_eligible[group]
        suffix = suffix + float(floor) * padded[arm_s, m]
        with np.errstate(divide="ignore", invalid="ignore"):
            price = np.where(w_k > 0, suffix / w_k, 0.0)
    price = np.where(w_k > 0, price, 0.0)
    price = np.where(eligible, price, np.nan)
    out = np.empty_like(price)
    out[order] = price
    return out
