"""Equilibrium bids of pay-your-bid position auctions, and simulated experiment logs.

Used by the tests, the benchmarks and the demo; nothing here reads real data.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import interpolate, special

from .allocation import AllocationRule, allocation_rule, mixture_rule
from .errors import InputError
from .spec import Experiment

__all__ = [
    "BidFunction",
    "equilibrium_bid_function",
    "expected_revenue_per_auction",
    "expected_welfare_per_auction",
    "simulate_experiment",
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


def equilibrium_bid_function(values, rule: AllocationRule, *, grid_intervals: int = _GRID) -> BidFunction:
    """Symmetric first-price (pay-your-bid per click) equilibrium bid function.

    ``b(q) = int_0^q v(r) x'(r) dr / x(q)`` with ``v = F^{-1}`` and no floor.

    Parameters
    ----------
    values : scipy.stats frozen continuous distribution
        Distribution of bidders' values per click.
    rule : AllocationRule
        The allocation rule bidders respond to (for an experiment: the mixture of its arms).
    grid_intervals : int
        Quadrature intervals on [0, 1] (16 Gauss-Legendre nodes each).

    Returns
    -------
    BidFunction

    Notes
    -----
    The running integral ``int_0^{q_k} v x'`` (16-point Gauss-Legendre per interval) and the
    division by ``x(q_k)`` are carried out in log space, so they stay exact where ``x``
    underflows (many bidders, few slots).

    References
    ----------
    .. [1] Krishna, V. (2010). Auction Theory, 2nd ed., ch. 2 (first-price equilibrium).
    """
    _check_distribution(values)
    if float(values.ppf(0.0)) < 0:
        raise InputError("`values` must be supported on [0, inf): a value per click is never negative")
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


def _per_bidder_integral(values, integrand_of_q, grid_intervals: int = _GRID) -> float:
    q = np.arange(grid_intervals + 1) / grid_intervals
    r, wts = _nodes(q)
    return float(np.sum(wts * values.ppf(r) * integrand_of_q(r)))


def _strata(n_bidders) -> dict[int, float]:
    if isinstance(n_bidders, Mapping):
        total = float(sum(n_bidders.values()))
        return {int(k): float(p) / total for k, p in n_bidders.items()}
    return {int(n_bidders): 1.0}


def expected_revenue_per_auction(values, position_weights: Sequence[float], n_bidders) -> float:
    """True revenue per auction of an arm in its own equilibrium (Myerson's formula).

    ``n * int_0^1 (1 - q) v(q) y'(q) dq``, by Gauss-Legendre quadrature; ``n_bidders`` may be a
    mapping ``{n: probability}``.

    References
    ----------
    .. [1] Myerson, R. (1981). Optimal auction design. Math. Oper. Res. 6(1), Lemma 3.
    """
    _check_distribution(values)
    total = 0.0
    for n, p in _strata(n_bidders).items():
        y = allocation_rule(position_weights, n)
        total += p * n * _per_bidder_integral(values, lambda r: (1 - r) * y.derivative(r.ravel()).reshape(r.shape))
    return total


def expected_welfare_per_auction(values, position_weights: Sequence[float], n_bidders) -> float:
    """True welfare per auction of an arm: expected value of the clicks sold, ``n * int v y dq``."""
    _check_distribution(values)
    total = 0.0
    for n, p in _strata(n_bidders).items():
        y = allocation_rule(position_weights, n)
        total += p * n * _per_bidder_integral(values, lambda r: y.value(r.ravel()).reshape(r.shape))
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

    Returns
    -------
    pandas.DataFrame
        The bids data contract (``experiment_id, ds, auction_id, bidder_id, arm, bid, position``)
        plus ``value`` and ``clicks`` (Bernoulli draws with the arm's position weights).
    """
    rng = np.random.default_rng(rng)
    if int(n_auctions) < 1:
        raise InputError("`n_auctions` must be >= 1")
    shares = np.asarray(experiment.shares)
    beliefs = shares if belief_shares is None else np.asarray(belief_shares, dtype=float)
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
        bid_fn = equilibrium_bid_function(values, mixture_rule(rules, beliefs))
        quantile = rng.random((idx.size, n))
        value = values.ppf(quantile)
        bid = bid_fn(quantile)
        order = np.argsort(-bid, axis=1)
        position = np.empty_like(order)
        np.put_along_axis(position, order, np.arange(1, n + 1)[None, :], axis=1)
        arm = np.repeat(arm_of_auction[idx], n).reshape(idx.size, n)
        weights = np.stack([r.position_weights for r in rules])  # (arms, n)
        w = weights[arm, position - 1]
        clicks = rng.random(w.shape) < w
        offset = rng.integers(0, bidder_pool, size=(idx.size, 1))
        bidder = (offset + np.arange(n)[None, :]) % bidder_pool
        frames.append(
            pd.DataFrame(
                {
                    "auction_id": np.repeat(idx + first_auction_id, n).astype("int64"),
                    "bidder_id": bidder.ravel().astype("int64"),
                    "arm_code": arm.ravel(),
                    "bid": bid.ravel(),
                    "position": np.where(w.ravel() > 0, position.ravel(), -1),
                    "value": value.ravel(),
                    "clicks": clicks.ravel().astype("int8"),
                }
            )
        )
    out = pd.concat(frames, ignore_index=True).sort_values(["auction_id", "bid"], ascending=[True, False], kind="stable")
    names = np.array(experiment.arm_names, dtype=object)
    out.insert(0, "experiment_id", experiment.id)
    out.insert(1, "ds", pd.Timestamp(ds).date() if ds is not None else pd.NaT)
    out["arm"] = names[out.pop("arm_code").to_numpy()]
    out["position"] = pd.array(np.where(out["position"] > 0, out["position"], 0), dtype="Int32")
    out.loc[out["position"] == 0, "position"] = pd.NA
    cols = ["experiment_id", "ds", "auction_id", "bidder_id", "arm", "bid", "position", "value", "clicks"]
    return out[cols].reset_index(drop=True)
