"""Equilibrium bids of position auctions, and simulated experiment logs.

Payment rules: pay-your-bid per click (``first_price``), next-lower bid per click (``gsp``) and
truthful per-click prices (``vcg``); optionally a floor shared by the arms and a quality factor
per bid (auctions rank by ``bid * quality``). Used by the tests, the benchmarks and the demo;
nothing here reads real data.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import interpolate, special

from .allocation import _Q_HI, _Q_LO, AllocationRule, allocation_rule, mixture_rule
from .errors import InputError
from .payment_rules import check_payment_rule
from .spec import Experiment

__all__ = [
    "BidFunction",
    "equilibrium_bid_function",
    "expected_revenue_per_auction",
    "expected_welfare_per_auction",
    "floor_quantile",
    "SimulatedSegment",
    "simulate_experiment",
    "simulate_segmented_experiment",
]

_GRID = 4096
_NODES, _NODE_WEIGHTS = np.polynomial.legendre.leggauss(16)


def _check_distribution(values) -> None:
    if not (hasattr(values, "ppf") and hasattr(values, "cdf")):
        raise InputError("`values` must be a frozen scipy.stats continuous distribution (with .ppf)")


@dataclass(frozen=True)
class BidFunction:
    """Equilibrium bid as a function of the bidder's quantile, ``b(q)``.

    Attributes
    ----------
    grid : ndarray
        Quantiles where the bid was computed by quadrature.
    bids : ndarray
        ``b`` on ``grid``.
    """

    grid: np.ndarray
    bids: np.ndarray

    def __call__(self, q) -> np.ndarray:
        return interpolate.PchipInterpolator(self.grid, self.bids)(np.asarray(q, dtype=float))


def _nodes(grid: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Gauss-Legendre nodes and weights on every interval of ``grid``; shapes (K, 16)."""
    lo, hi = grid[:-1, None], grid[1:, None]
    half = (hi - lo) / 2
    return lo + half * (_NODES + 1), half * _NODE_WEIGHTS


def floor_quantile(values, floor: float) -> float:
    """The floor's quantile ``q* = F(r)`` among the (effective) values; validates the floor.

    Raises ``InputError`` when the floor is not a finite number > 0 or lies above every value.
    """
    _check_distribution(values)
    r = float(floor)
    if not np.isfinite(r) or r <= 0:
        raise InputError(f"`floor` must be a finite number > 0; got {floor!r}")
    qs = float(values.cdf(r))
    if not qs < 1.0:
        raise InputError(f"`floor` {r:g} lies above every value (F(floor) = 1): no bid would be eligible")
    return qs


def equilibrium_bid_function(
    values,
    rule: AllocationRule,
    *,
    grid_intervals: int = _GRID,
    payment_rule: str = "first_price",
    floor: float | None = None,
) -> BidFunction:
    """Symmetric equilibrium bid function of a position auction, per click.

    * ``first_price``: ``b(q) = [r x(q*) + int_{q*}^q v(s) x'(s) ds] / x(q)`` (``r = q* = 0``
      without a floor);
    * ``gsp`` (next-lower bid per click): the solution of the Volterra equation
      ``b(q) D(q) = v x' + sum_{k>=2} W_k c_k (k-1) (1-q)^(k-2) B_k(q)`` with
      ``B_k(q) = r q*^(n-k) + (n-k) int_{q*}^q b(s) s^(n-k-1) ds``, ``c_k = C(n-1, k-1)``,
      ``D(q) = sum_{k<n} W_k c_k (n-k) (1-q)^(k-1) q^(n-k-1)``, solved forward in ``q``;
    * ``vcg``: ``b = v``.

    Parameters
    ----------
    values : scipy.stats frozen continuous distribution
        Distribution of bidders' values per click (with quality factors: of the effective values
        ``value * quality``).
    rule : AllocationRule
        The allocation rule bidders respond to (for an experiment: the mixture of its arms).
    grid_intervals : int
        Quadrature intervals on [0, 1] (16 Gauss-Legendre nodes each), or steps of the ``gsp``
        solver on ``[q*, 1]``.
    payment_rule : {'first_price', 'gsp', 'vcg'}
        Payment rule of the auction.
    floor : float, optional
        Floor ``r`` per click (effective-bid units). With a floor the returned grid covers
        ``[q*, 1]`` only (``q* = F(r)``, ``b(q*) = r``); bidders below ``q*`` are ineligible.

    Returns
    -------
    BidFunction

    Notes
    -----
    The running integral ``int_0^{q_k} v x'`` (16-point Gauss-Legendre per interval) and the
    division by ``x(q_k)`` are carried out in log space, so they stay exact where ``x``
    underflows (many bidders, few slots). The ``gsp`` solver carries ``B_k(q) / q^(n-k)`` and
    integrates ``b`` piecewise linearly (error of order ``grid_intervals^-2``). When the solution
    decreases somewhere, the symmetric equilibrium does not exist for these weights (Gomes and
    Sweeney 2014); the function still returns it, so that checks can reveal it.

    References
    ----------
    .. [1] Krishna, V. (2010). Auction Theory, 2nd ed., ch. 2 (first-price equilibrium).
    .. [2] Gomes, R. and Sweeney, K. (2014). Bayes-Nash equilibria of the generalized second-price
       auction. Games Econ. Behav. 86, 421-437.
    .. [3] Vickrey, W. (1961). Counterspeculation, auctions, and competitive sealed tenders.
       J. Finance 16(1), 8-37.
    """
    _check_distribution(values)
    if float(values.ppf(0.0)) < 0:
        raise InputError("`values` must be supported on [0, inf): a value per click is never negative")
    check_payment_rule(payment_rule)
    if payment_rule != "first_price" or floor is not None:
        r, qs = (0.0, 0.0) if floor is None else (float(floor), floor_quantile(values, floor))
        q = qs + (1.0 - qs) * (np.arange(grid_intervals + 1) / grid_intervals)
        if payment_rule == "vcg":
            return _GspBidFunction(grid=q, bids=_values_at(values, q), rest=np.zeros_like(q), values=values)
        if payment_rule == "gsp":
            return _gsp_bid_function(values, rule, q, r)
        return BidFunction(grid=q, bids=_first_price_bids_with_floor(values, rule, q, r))
    q = np.arange(grid_intervals + 1) / grid_intervals
    r, wts = _nodes(q)
    log_x = rule.log_value(q)
    log_dx = rule.log_derivative(r.ravel()).reshape(r.shape)
    with np.errstate(divide="ignore"):
        log_terms = np.log(wts * values.ppf(r)) + log_dx
    # log of int_{q_{k-1}}^{q_k} v x', then of the running integral, all in log space.
    log_piece = special.logsumexp(log_terms, axis=1)
    log_running = np.logaddexp.accumulate(log_piece)
    b = np.empty_like(q)
    b[1:] = np.exp(log_running - log_x[1:])
    # b(0): 0 when the lowest bidder is shown (x(0) > 0); its value v(0) when x(0) = 0.
    b[0] = 0.0 if rule.coefficients[0] > 0 else float(values.ppf(0.0))
    return BidFunction(grid=q, bids=b)


def _values_at(values, q: np.ndarray) -> np.ndarray:
    """``F^{-1}(q)``, with ``q = 1`` moved one ulp inside so unbounded values stay finite."""
    return values.ppf(np.minimum(q, _Q_HI))


def _first_price_bids_with_floor(values, rule: AllocationRule, q: np.ndarray, r: float) -> np.ndarray:
    """``b(q) = [r x(q*) + int_{q*}^q v x'] / x(q)`` on ``q`` (``q[0] = q*``), in log space."""
    nodes, wts = _nodes(q)
    log_x = rule.log_value(q)
    log_dx = rule.log_derivative(nodes.ravel()).reshape(nodes.shape)
    with np.errstate(divide="ignore"):
        log_terms = np.log(wts * values.ppf(nodes)) + log_dx
        log_start = np.log(r) + log_x[0]
    log_piece = special.logsumexp(log_terms, axis=1)
    log_running = np.logaddexp.accumulate(np.r_[log_start, log_piece])
    with np.errstate(invalid="ignore"):
        b = np.exp(log_running - log_x)
    b[0] = r if r > 0 else (0.0 if rule.coefficients[0] > 0 else float(values.ppf(0.0)))
    return b


def _gsp_log_d(rule: AllocationRule, q: np.ndarray) -> np.ndarray:
    """``log D(q)``, ``D = sum_{k<n} W_k c_k (n-k) (1-q)^(k-1) q^(n-k-1)`` (q clipped inside (0, 1))."""
    n = rule.n_bidders
    w = rule.position_weights
    qc = np.clip(q, _Q_LO, _Q_HI)[..., None]
    k = np.arange(1, n)[w[: n - 1] > 0]
    c = special.comb(n - 1, k - 1)
    return special.logsumexp(np.log(w[k - 1] * c * (n - k)) + (k - 1) * np.log1p(-qc) + (n - k - 1) * np.log(qc), axis=-1)


def _gsp_value_factor(rule: AllocationRule, q: np.ndarray) -> np.ndarray:
    """``x'(q) / D(q)`` (in [0, 1]): the weight of the bidder's own value in its gsp bid."""
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.exp(rule.log_derivative(np.clip(q, _Q_LO, _Q_HI)) - _gsp_log_d(rule, q))
    return np.where(np.isfinite(out), out, 0.0)


@dataclass(frozen=True)
class _GspBidFunction(BidFunction):
    """``b(q) = v(q) x'(q)/D(q) + S(q)``: the value part exact at any ``q``, the smooth rest ``S``
    (bounded even when values are not) interpolated on the grid. ``rule=None``: ``b = v`` (vcg)."""

    rest: np.ndarray = None
    values: object = None
    rule: AllocationRule = None

    def __call__(self, q) -> np.ndarray:
        q = np.asarray(q, dtype=float)
        if self.rule is None:  # vcg: b = v
            return self.values.ppf(q)
        rest = interpolate.PchipInterpolator(self.grid, self.rest)(q)
        return self.values.ppf(q) * _gsp_value_factor(self.rule, q) + rest


def _gsp_bid_function(values, rule: AllocationRule, q: np.ndarray, r: float) -> BidFunction:
    """Forward solution of the generalized-second-price Volterra equation on ``q`` (``q[0] = q*``).

    State: ``beta_k(q) = B_k(q) / q^m`` (``m = n - k``), a weighted mean of ``b`` below ``q``
    (plus the floor's share), so nothing under- or overflows near ``q = 0``. With
    ``e_k = W_k c_k (k-1) (1-q)^(k-2) q^m / D`` (``sum_k e_k = 1 - x'/D <= 1``) the equation reads
    ``b = v x'/D + S``, ``S = sum_k e_k beta_k``. Over a step ``[q0, q1]`` the value part
    ``v x'/D`` is integrated by 16-point Gauss-Legendre (never at ``q = 1``, where unbounded values
    are infinite) and ``S`` as a linear function, so
    ``beta_k(q1) = rho^m beta_k(q0) + m/q1^m int v x'/D s^(m-1) + S0 (1 - rho^m - G_k) + S1 G_k``
    (``rho = q0/q1``), linear in ``S1``: each step solves one scalar equation.
    """
    n = rule.n_bidders
    if n == 1:  # the price is the floor whatever the bid: bidding the value is weakly dominant, b = v
        return _GspBidFunction(grid=q, bids=_values_at(values, q), rest=np.zeros_like(q), values=values)
    w = rule.position_weights
    if not np.any(w[: n - 1] > 0):
        raise InputError("gsp: no position above the last is shown, so no bid is ever priced")
    k_all = np.arange(1, n + 1)
    c = special.comb(n - 1, k_all - 1)
    qc = np.clip(q, _Q_LO, _Q_HI)
    lq, l1q = np.log(qc)[:, None], np.log1p(-qc)[:, None]
    log_d = _gsp_log_d(rule, q)
    ke = np.arange(2, n + 1)
    with np.errstate(divide="ignore"):
        log_e = np.log(w[ke - 1] * c[ke - 1] * (ke - 1)) + (ke - 2) * l1q + (n - ke) * lq - log_d[:, None]
    e = np.exp(log_e)  # (K+1, n-1), columns k = 2..n
    e_top, e = e[:, -1], e[:, :-1]  # k = n (m = 0: B_n = r) and k = 2..n-1
    m = (n - ke[:-1]).astype(float)
    q0, q1 = q[:-1, None], q[1:, None]
    with np.errstate(divide="ignore"):
        log_rho = np.log(q0 / q1)
    one_minus = -np.expm1(m * log_rho)  # 1 - rho^m
    one_minus_1 = -np.expm1((m + 1) * log_rho)
    g = (q1 * m / (m + 1) * one_minus_1 - q0 * one_minus) / (q1 - q0)
    keep = 1.0 - one_minus  # rho^m
    # m / q1^m int_{q0}^{q1} v x'/D s^(m-1) ds on every step, by Gauss-Legendre.
    nodes, wts = _nodes(q)  # (K, 16)
    vr = values.ppf(nodes) * _gsp_value_factor(rule, nodes)
    scaled = np.exp((m - 1) * np.log(nodes)[..., None] - m * np.log(q1)[..., None])  # (K, 16, n-2)
    value_part = m * np.einsum("kj,kjm->km", wts * vr, scaled)
    v_term = _values_at(values, q) * _gsp_value_factor(rule, q)
    rest = np.empty_like(q)
    if q[0] > 0:  # floor: B_k(q*) = r q*^m, and b(q*) = r
        state = np.full(m.size, r)
        rest[0] = e_top[0] * r + e[0] @ state
    else:  # beta_k(0) = b(0) / m
        rest[0] = (e_top[0] * r + (e[0] @ (1.0 / m)) * v_term[0]) / (1.0 - e[0] @ (1.0 / m)) if m.size else e_top[0] * r
        state = (v_term[0] + rest[0]) / m
    for i in range(1, q.size):
        p = keep[i - 1] * state + value_part[i - 1] + rest[i - 1] * (one_minus[i - 1] - g[i - 1])
        ei = e[i]
        rest[i] = (e_top[i] * r + ei @ p) / (1.0 - ei @ g[i - 1])
        state = p + g[i - 1] * rest[i]
    return _GspBidFunction(grid=q, bids=v_term + rest, rest=rest, values=values, rule=rule)

def _per_bidder_integral(values, integrand_of_q, grid_intervals: int = _GRID, lower: float = 0.0) -> float:
    q = np.arange(grid_intervals + 1) / grid_intervals
    if lower > 0:
        q = lower + (1.0 - lower) * q
    r, wts = _nodes(q)
    return float(np.sum(wts * values.ppf(r) * integrand_of_q(r)))


def _strata(n_bidders) -> dict[int, float]:
    if isinstance(n_bidders, Mapping):
        total = float(sum(n_bidders.values()))
        return {int(k): float(p) / total for k, p in n_bidders.items()}
    return {int(n_bidders): 1.0}


def expected_revenue_per_auction(values, position_weights: Sequence[float], n_bidders, *, floor: float | None = None) -> float:
    """True revenue per auction of an arm in its own equilibrium (Myerson's formula).

    ``n * [r (1 - q*) y(q*) + int_{q*}^1 (1 - q) v(q) y'(q) dq]`` by Gauss-Legendre quadrature
    (``r = q* = 0`` without a floor), whatever the payment rule (revenue equivalence);
    ``n_bidders`` may be a mapping ``{n: probability}``.

    Parameters
    ----------
    values : scipy.stats frozen continuous distribution
        Values per click (effective values ``value * quality`` when auctions rank by quality).
    position_weights : sequence of float
    n_bidders : int or mapping of int to float
    floor : float, optional
        Floor ``r`` per click shared by the arms.

    References
    ----------
    .. [1] Myerson, R. (1981). Optimal auction design. Math. Oper. Res. 6(1), Lemma 3.
    """
    _check_distribution(values)
    r, qs = (0.0, 0.0) if floor is None else (float(floor), floor_quantile(values, floor))
    total = 0.0
    for n, p in _strata(n_bidders).items():
        y = allocation_rule(position_weights, n)
        integral = _per_bidder_integral(values, lambda u: (1 - u) * y.derivative(u.ravel()).reshape(u.shape), lower=qs)
        if floor is not None:
            integral += r * (1 - qs) * float(y.value(qs))
        total += p * n * integral
    return total


def expected_welfare_per_auction(values, position_weights: Sequence[float], n_bidders, *, floor: float | None = None) -> float:
    """True welfare per auction of an arm: expected value of the clicks sold, ``n * int_{q*}^1 v y dq``."""
    _check_distribution(values)
    qs = 0.0 if floor is None else floor_quantile(values, floor)
    total = 0.0
    for n, p in _strata(n_bidders).items():
        y = allocation_rule(position_weights, n)
        total += p * n * _per_bidder_integral(values, lambda u: y.value(u.ravel()).reshape(u.shape), lower=qs)
    return total


def simulate_experiment(
    values,
    experiment: Experiment,
    *,
    n_bidders,
    n_auctions: int,
    rng: np.random.Generator | int | None = None,
    belief_shares: Sequence[float] | None = None,
    ds=None,
    first_auction_id: int = 0,
    bidder_pool: int = 5000,
    payment_rule: str | None = None,
    floor: float | None = None,
    quality=None,
    scale_covariates: Mapping[str, tuple[float, object]] | None = None,
    unobserved_scale_sd: float = 0.0,
) -> pd.DataFrame:
    """Simulate one experiment's bid log: bids answer the mixture, the arm is drawn per auction.

    Parameters
    ----------
    values : scipy.stats frozen continuous distribution
        Bidders' values per click, independent across bidders and auctions.
    experiment : Experiment
        Arms, shares and position weights.
    n_bidders : int or mapping of int to float
        Bidders per auction, or a distribution ``{n: probability}``.
    n_auctions : int
    rng : numpy Generator or int, optional
    belief_shares : sequence of float, optional
        Shares bidders believe in when bidding (defaults to the designed shares). Different
        beliefs simulate a market that has not yet adapted, e.g. the days after a launch.
    ds : date-like, optional
        Value of the ``ds`` column.
    first_auction_id : int
        Auction ids are consecutive from here.
    bidder_pool : int
        Bidder ids are drawn from ``0 .. bidder_pool - 1`` (distinct within an auction).
    payment_rule : {'first_price', 'gsp', 'vcg'}, optional
        Payment rule of the auctions (decides the equilibrium bids). Default: the experiment's.
    floor : float, optional
        Floor per click shared by the arms, in effective-bid units (default: the experiment's;
        ``None`` or 0 there means no floor). Bidders whose (effective)
        value is below it are ineligible: they submit their value, are logged with a null
        position and never priced, so ``n`` still counts every bidder.
    quality : scipy.stats frozen distribution, optional
        Quality factor per bid (> 0), independent of the effective value. Auctions rank by
        ``bid * quality``; ``values`` is then the distribution of the effective value
        ``value * quality`` (the symmetric private value of the click model in which bidder ``i``
        at position ``k`` gets ``w_k * quality_i`` clicks), the submitted bid is the effective
        bid divided by the quality, and ``value`` is logged per click (effective value / quality).
    scale_covariates : mapping of str to (float, distribution), optional
        Auction-level columns ``{name: (gamma, distribution of x)}``: every value (and, the
        equilibrium being homogeneous of degree one in the values without a floor, every bid) of
        auction ``j`` is multiplied by ``exp(sum_k gamma_k x_jk)``; the drawn ``x`` are logged in
        column ``name``. Refused with a floor.
    unobserved_scale_sd : float, optional
        Log-sd ``sigma`` of an unlogged auction-level factor ``exp(sigma e_j - sigma^2 / 2)``
        (``e_j`` standard normal, mean-one factor) multiplying the auction's values and bids as
        above. Default 0: none. Refused with a floor.

    Returns
    -------
    pandas.DataFrame
        The bids data contract (``experiment_id, ds, auction_id, bidder_id, arm, bid, position``)
        plus ``value`` and ``clicks`` (Bernoulli draws with the arm's position weights, times the
        quality), and ``quality`` when quality factors are simulated.

    References
    ----------
    .. [1] Varian, H. (2007). Position auctions. Int. J. Ind. Organ. 25(6), 1163-1178.
    """
    rng = np.random.default_rng(rng)
    if int(n_auctions) < 1:
        raise InputError("`n_auctions` must be >= 1")
    shares = np.asarray(experiment.shares)
    beliefs = shares if belief_shares is None else np.asarray(belief_shares, dtype=float)
    if payment_rule is None:  # the auction the spec says ran (a spec with a floor simulates its floor)
        payment_rule = experiment.payment_rule
    if floor is None and experiment.floor:
        floor = float(experiment.floor)
    check_payment_rule(payment_rule)
    rule_options = {}
    if payment_rule != "first_price":
        rule_options["payment_rule"] = payment_rule
    if floor is not None:
        rule_options["floor"] = floor
        q_floor = floor_quantile(values, floor)
    if quality is not None and not hasattr(quality, "rvs"):
        raise InputError("`quality` must be a frozen scipy.stats distribution (with .rvs)")
    strata = _strata(n_bidders)
    ns = np.array(sorted(strata))
    n_of_auction = rng.choice(ns, size=int(n_auctions), p=[strata[n] for n in ns])
    arm_of_auction = rng.choice(len(shares), size=int(n_auctions), p=shares / shares.sum())
    frames = []
    for n in ns:
        idx = np.flatnonzero(n_of_auction == n)
        if idx.size == 0:
            continue
        if n > bidder_pool:
            raise InputError(f"`bidder_pool` ({bidder_pool}) must be at least the number of bidders ({n})")
        rules = [allocation_rule(a.weights_for(n), n) for a in experiment.arms]
        bid_fn = equilibrium_bid_function(values, mixture_rule(rules, beliefs), **rule_options)
        quantile = rng.random((idx.size, n))
        value = values.ppf(quantile)
        bid = value.copy() if payment_rule == "vcg" else bid_fn(quantile)  # effective bids
        if floor is not None:
            eligible = quantile >= q_floor
            bid = np.where(eligible, bid, value)  # sub-floor bidders submit their value
        factor = None if quality is None else quality.rvs(size=bid.shape, random_state=rng)
        order = np.argsort(-bid, axis=1)
        position = np.empty_like(order)
        np.put_along_axis(position, order, np.arange(1, n + 1)[None, :], axis=1)
        arm = np.repeat(arm_of_auction[idx], n).reshape(idx.size, n)
        weights = np.stack([r.position_weights for r in rules])  # (arms, n)
        w = weights[arm, position - 1]
        if floor is not None:
            w = np.where(eligible, w, 0.0)
        if factor is not None:
            if not np.all(factor > 0):
                raise InputError("`quality` must draw factors > 0")
            click_rate = w * factor
            if np.any(click_rate > 1):
                raise InputError("position weight x quality exceeds 1: clicks are Bernoulli draws; "
                                 "use a quality distribution bounded by 1 / (top position weight)")
            clicks = rng.random(w.shape) < click_rate
        else:
            clicks = rng.random(w.shape) < w
        offset = rng.integers(0, bidder_pool, size=(idx.size, 1))
        bidder = (offset + np.arange(n)[None, :]) % bidder_pool
        columns = {
            "auction_id": np.repeat(idx + first_auction_id, n).astype("int64"),
            "bidder_id": bidder.ravel().astype("int64"),
            "arm_code": arm.ravel(),
            "bid": bid.ravel() if factor is None else (bid / factor).ravel(),
            "position": np.where(w.ravel() > 0, position.ravel(), -1),
            "value": value.ravel() if factor is None else (value / factor).ravel(),
            "clicks": clicks.ravel().astype("int8"),
        }
        if factor is not None:
            columns["quality"] = factor.ravel()
        frames.append(pd.DataFrame(columns))
    out = pd.concat(frames, ignore_index=True).sort_values(["auction_id", "bid"], ascending=[True, False], kind="stable")
    names = np.array(experiment.arm_names, dtype=object)
    out.insert(0, "experiment_id", experiment.id)
    out.insert(1, "ds", pd.Timestamp(ds).date() if ds is not None else pd.NaT)
    out["arm"] = names[out.pop("arm_code").to_numpy()]
    out["position"] = pd.array(np.where(out["position"] > 0, out["position"], 0), dtype="Int32")
    out.loc[out["position"] == 0, "position"] = pd.NA
    cols = ["experiment_id", "ds", "auction_id", "bidder_id", "arm", "bid", "position", "value", "clicks"]
    if quality is not None:
        cols.append("quality")
    if scale_covariates or unobserved_scale_sd:
        if floor:
            raise InputError("scale covariates and unobserved scale factors are not simulated with a floor: "
                             "the floor does not scale with them")
        cols += _scale_auctions(out, dict(scale_covariates or {}), float(unobserved_scale_sd), int(n_auctions),
                                first_auction_id, rng)
    return out[cols].reset_index(drop=True)


@dataclass(frozen=True)
class SimulatedSegment:
    """One segment of a simulated marketplace: its own values, bidder counts and share of auctions.

    Attributes
    ----------
    values : scipy.stats frozen continuous distribution
        Values per click of the segment's bidders.
    n_bidders : int or mapping of int to float
        Bidders per auction of the segment (as :func:`simulate_experiment`).
    auction_share : float
        Share of the auctions in this segment (> 0; the shares are normalised).
    """

    values: object
    n_bidders: object
    auction_share: float


def simulate_segmented_experiment(segments: Mapping[str, SimulatedSegment], experiment: Experiment, *,
                                  n_auctions: int, rng: np.random.Generator | int | None = None,
                                  column: str = "segment", **options) -> pd.DataFrame:
    """Simulate a log whose auctions fall in segments, each with its own values and bidder counts.

    Bidders of a segment bid the equilibrium of their own segment (they know which segment the
    auction is in: the segment is observed before the auction). The arm is drawn per auction
    across segments alike.

    Parameters
    ----------
    segments : mapping of str to SimulatedSegment
        Segment label -> its values, bidder counts and share of auctions.
    experiment : Experiment
    n_auctions : int
        Auctions in all; each segment gets a multinomial draw by its share.
    rng : numpy Generator or int, optional
    column : str, optional
        Name of the segment column of the log. Default ``'segment'``.
    **options
        Passed to :func:`simulate_experiment` (``ds``, ``bidder_pool``, ``payment_rule``, ...).

    Returns
    -------
    pandas.DataFrame
        :func:`simulate_experiment`'s columns plus ``column`` (text), auction ids distinct
        across segments.

    References
    ----------
    .. [1] Varian, H. (2007). Position auctions. Int. J. Ind. Organ. 25(6), 1163-1178.
    """
    rng = np.random.default_rng(rng)
    if not segments:
        raise InputError("`segments` must name at least one segment")
    names = list(segments)
    shares = np.array([float(segments[k].auction_share) for k in names])
    if not np.all(np.isfinite(shares) & (shares > 0)):
        raise InputError("every segment's `auction_share` must be a finite number > 0")
    counts = rng.multinomial(int(n_auctions), shares / shares.sum())
    frames, first = [], int(options.pop("first_auction_id", 0))
    for name, count in zip(names, counts.tolist()):
        if count == 0:
            continue
        seg = segments[name]
        frame = simulate_experiment(seg.values, experiment, n_bidders=seg.n_bidders, n_auctions=count, rng=rng,
                                    first_auction_id=first, **options)
        frame[column] = name
        frames.append(frame)
        first += count
    return pd.concat(frames, ignore_index=True)


def _scale_auctions(out: pd.DataFrame, covariates: dict, sigma: float, n_auctions: int, first_auction_id: int,
                    rng: np.random.Generator) -> list[str]:
    """Multiply each auction's values and bids by ``exp(gamma . x_j + sigma e_j - sigma^2/2)``, in place.

    Without a floor the equilibrium bid is homogeneous of degree one in the values (the first-order
    condition, and the next-price one, are linear in values and bids; docs/method.md, "Scale
    covariates"), so scaling an auction's equilibrium bids is its equilibrium under scaled values.
    Returns the covariate columns added.
    """
    if not (math.isfinite(sigma) and sigma >= 0):
        raise InputError(f"`unobserved_scale_sd` must be a finite number >= 0; got {sigma!r}")
    log_factor = np.zeros(n_auctions)
    for name, spec in covariates.items():
        if name in out.columns:
            raise InputError(f"scale covariate {name!r} clashes with a column of the simulated log")
        gamma, dist = spec
        x = dist.rvs(size=n_auctions, random_state=rng)
        log_factor += float(gamma) * x
        out[name] = x[out["auction_id"].to_numpy() - first_auction_id]
    if sigma:
        log_factor += sigma * rng.standard_normal(n_auctions) - sigma**2 / 2
    factor = np.exp(log_factor)[out["auction_id"].to_numpy() - first_auction_id]
    out["bid"] = out["bid"].to_numpy() * factor
    out["value"] = out["value"].to_numpy() * factor
    return list(covariates)
