"""Allocation rules of rank-based position auctions, in quantile space.

A bidder at quantile ``q`` (1 = highest value) facing ``n - 1`` others with independent uniform
quantiles lands in position ``k`` with probability ``C(n-1, k-1) (1-q)^(k-1) q^(n-k)``; with position
weights ``w`` its expected clicks are the Bernstein polynomial

    x(q) = sum_k w_k C(n-1, k-1) (1-q)^(k-1) q^(n-k) = sum_j c_j B_{j,n-1}(q),   c_j = w_{n-j}.

Non-increasing weights make the coefficients ``c_j`` non-decreasing, so ``x`` is non-decreasing.
Mixtures of arms are Bernstein polynomials with share-weighted coefficients. All evaluation goes
through the binomial distribution's pmf, survival function and log-pmf (log-space where ratios are
formed), which keeps it stable for n up to several hundred; they are computed with ``scipy.special``
(:func:`_binom_pmf`, :func:`_binom_sf`, :func:`_binom_logpmf`), so that importing an allocation rule
does not load ``scipy.stats``; the tests check them against ``scipy.stats.binom``.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import special

from .errors import InputError

__all__ = ["AllocationRule", "allocation_rule", "mixture_rule", "derivative_ratio"]

# q is clipped into this open interval wherever a ratio of vanishing polynomials is formed, so the
# log-space evaluation returns the one-sided limit at the end points.
_Q_LO = 1e-300
_Q_HI = 1.0 - 2.0**-53


@dataclass(frozen=True)
class AllocationRule:
    """Expected clicks of a bidder as a function of its quantile.

    Attributes
    ----------
    position_weights : ndarray, shape (n,)
        Click weight of positions 1..n (top first), zero-padded to the number of bidders.
    """

    position_weights: np.ndarray

    @property
    def n_bidders(self) -> int:
        return int(self.position_weights.shape[0])

    @property
    def coefficients(self) -> np.ndarray:
        """Bernstein coefficients ``c_j = w_{n-j}``, j = 0..n-1 (non-decreasing)."""
        return self.position_weights[::-1].copy()

    @property
    def derivative_coefficients(self) -> np.ndarray:
        """Forward differences ``d_j = c_{j+1} - c_j`` (>= 0) of the coefficients."""
        return np.diff(self.coefficients)

    def value(self, q) -> np.ndarray:
        """``x(q)``: expected clicks at quantile ``q``."""
        q = _as_q(q)
        m = self.n_bidders - 1
        if m == 0:
            return np.full(q.shape, self.position_weights[0])
        j = np.arange(m + 1)
        return _binom_pmf(j, m, q[..., None]) @ self.coefficients

    def derivative(self, q) -> np.ndarray:
        """``x'(q)``."""
        q = _as_q(q)
        m = self.n_bidders - 1
        if m == 0:
            return np.zeros(q.shape)
        j = np.arange(m)
        return m * (_binom_pmf(j, m - 1, q[..., None]) @ self.derivative_coefficients)

    def integral(self, q) -> np.ndarray:
        """``X(q) = int_0^q x(r) dr``.

        Uses ``int_0^q B_{j,m}(r) dr = P(Binomial(m+1, q) >= j+1) / (m+1)``.
        """
        q = _as_q(q)
        m = self.n_bidders - 1
        j = np.arange(m + 1)
        return (_binom_sf(j, m + 1, q[..., None]) @ self.coefficients) / (m + 1)

    def log_value(self, q) -> np.ndarray:
        """``log x(q)``, accurate where ``x`` underflows (``-inf`` where it is exactly 0)."""
        q = np.clip(_as_q(q), _Q_LO, _Q_HI)
        m = self.n_bidders - 1
        return _log_bernstein(self.coefficients, m, q)

    def log_derivative(self, q) -> np.ndarray:
        """``log x'(q)`` (``-inf`` where the rule is flat)."""
        q = np.clip(_as_q(q), _Q_LO, _Q_HI)
        m = self.n_bidders - 1
        if m == 0:
            return np.full(q.shape, -np.inf)
        return np.log(m) + _log_bernstein(self.derivative_coefficients, m - 1, q)

    def __repr__(self) -> str:  # compact, for logs
        return f"AllocationRule(n={self.n_bidders}, w={np.round(self.position_weights, 4).tolist()})"


def _binom_pmf(k: np.ndarray, m: int, q: np.ndarray) -> np.ndarray:
    """``C(m, k) q^k (1 - q)^(m - k)``: the Binomial(m, q) pmf at integers ``0 <= k <= m``."""
    return special.binom(m, k) * q**k * (1.0 - q) ** (m - k)


def _binom_sf(k: np.ndarray, m: int, q: np.ndarray) -> np.ndarray:
    """``P(Binomial(m, q) > k)`` at integers ``0 <= k <= m`` (the regularised incomplete beta function)."""
    return special.bdtrc(k, m, q)


def _binom_logpmf(k: np.ndarray, m: int, q: np.ndarray) -> np.ndarray:
    """``log C(m, k) + k log q + (m - k) log(1 - q)`` (``-inf`` where the pmf is 0), as ``scipy.stats`` forms it."""
    combiln = special.gammaln(m + 1) - (special.gammaln(k + 1) + special.gammaln(m - k + 1))
    return combiln + special.xlogy(k, q) + special.xlog1py(m - k, -q)


def _as_q(q) -> np.ndarray:
    q = np.asarray(q, dtype=float)
    if q.size and (np.nanmin(q) < 0 or np.nanmax(q) > 1):
        raise InputError("`q` must lie in [0, 1]")
    return q


def _log_bernstein(coef: np.ndarray, m: int, q: np.ndarray) -> np.ndarray:
    """log sum_j coef_j B_{j,m}(q) for non-negative coefficients."""
    support = np.flatnonzero(coef > 0)
    if support.size == 0:
        return np.full(q.shape, -np.inf)
    logb = _binom_logpmf(support, m, q[..., None])
    return special.logsumexp(logb, b=coef[support], axis=-1)


def allocation_rule(position_weights: Sequence[float], n_bidders: int) -> AllocationRule:
    """Allocation rule of one arm for auctions with ``n_bidders`` participants.

    Parameters
    ----------
    position_weights : sequence of float
        Click weight per position, top first; non-negative, non-increasing. Shorter than
        ``n_bidders``: the remaining positions weigh 0. Longer: cut to ``n_bidders``.
    n_bidders : int
        Number of bidders in the auction, >= 1.

    Returns
    -------
    AllocationRule

    References
    ----------
    .. [1] Myerson, R. (1981). Optimal auction design. Mathematics of Operations Research 6(1).
    .. [2] Krishna, V. (2010). Auction Theory, 2nd ed., Academic Press.

    Examples
    --------
    >>> rule = allocation_rule([1.0], 3)     # one slot, three bidders: x(q) = q^2
    >>> float(rule.value(0.5))
    0.25
    """
    if isinstance(n_bidders, bool) or int(n_bidders) != n_bidders or n_bidders < 1:
        raise InputError(f"`n_bidders` must be an integer >= 1; got {n_bidders!r}")
    n = int(n_bidders)
    w = np.asarray(position_weights, dtype=float).ravel()
    if w.size == 0 or not np.all(np.isfinite(w)) or np.any(w < 0):
        raise InputError("`position_weights` must be a non-empty list of finite numbers >= 0")
    if np.any(np.diff(w) > 0):
        k = int(np.flatnonzero(np.diff(w) > 0)[0]) + 2
        raise InputError(f"`position_weights` must be non-increasing; position {k} exceeds position {k - 1}")
    full = np.zeros(n)
    full[: min(n, w.size)] = w[:n]
    return AllocationRule(full)


def mixture_rule(rules: Sequence[AllocationRule], shares: Sequence[float]) -> AllocationRule:
    """The allocation rule bidders face when arm ``a`` runs in a share ``s_a`` of auctions.

    ``x_C(q) = sum_a s_a x_a(q)``; as the map from weights to rules is linear, this is the rule of
    the share-weighted position weights.

    Parameters
    ----------
    rules : sequence of AllocationRule
        Same number of bidders each.
    shares : sequence of float
        Non-negative, summing to 1.

    Returns
    -------
    AllocationRule
    """
    if len(rules) == 0 or len(rules) != len(shares):
        raise InputError("`rules` and `shares` must be non-empty and of equal length")
    n = {r.n_bidders for r in rules}
    if len(n) != 1:
        raise InputError(f"all rules must have the same number of bidders; got {sorted(n)}")
    s = np.asarray(shares, dtype=float)
    if np.any(s < 0) or abs(s.sum() - 1.0) > 1e-6:
        raise InputError(f"`shares` must be >= 0 and sum to 1; they sum to {s.sum():.9g}")
    w = sum(si * r.position_weights for si, r in zip(s, rules))
    return AllocationRule(np.asarray(w, dtype=float))


def derivative_ratio(numerator: AllocationRule, denominator: AllocationRule, q) -> np.ndarray:
    """``y'(q) / x'(q)`` evaluated stably, with its one-sided limits at ``q = 0`` and ``q = 1``.

    Both derivatives are Bernstein polynomials with non-negative coefficients; numerator and
    denominator are scaled by the largest basis term on the denominator's support, so the ratio
    stays finite where both underflow. Where the denominator is identically zero the ratio is 0.
    The ratio is bounded by ``1 / s`` when the denominator is a mixture giving the numerator's
    arm a share ``s``.
    """
    q = np.clip(_as_q(q), _Q_LO, _Q_HI)
    m = denominator.n_bidders - 1
    if numerator.n_bidders != denominator.n_bidders:
        raise InputError("rules must have the same number of bidders")
    if m == 0:
        return np.zeros(q.shape)
    dx = denominator.derivative_coefficients
    dy = numerator.derivative_coefficients
    support = np.flatnonzero((dx > 0) | (dy > 0))
    if not np.any(dx > 0):
        return np.zeros(q.shape)
    logb = _binom_logpmf(support, m - 1, q[..., None])
    den_mask = dx[support] > 0
    scale = np.max(np.where(den_mask, logb, -np.inf), axis=-1, keepdims=True)
    basis = np.exp(logb - scale)
    return (basis @ dy[support]) / (basis @ dx[support])
