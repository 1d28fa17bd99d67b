"""Monte Carlo of daily looks at the experiment-to-date lift: fixed intervals against anytime-valid bounds.

Each replicate simulates the days of one experiment in equilibrium, estimates each day's stratum
with the estimator's own weighted order statistic and influence function (the pass of
``estimate_arms``: ``_lstatistic.l_statistic`` with the study's cached weights), and combines the
days cumulatively as ``combine_pieces`` does (``T = sum_d pi_d T_d``; auction clustering adds the
days' CR0 covariances, bidder clustering adds each bidder's sums across days before squaring). The
tests check a day and a cumulative combination against ``stratum_pieces`` + ``combine_pieces``.

Two ways bidders meet across days: ``pool=None`` draws every bid's value afresh (bids of different
auctions independent; intervals clustered by auction); ``pool=P`` draws ``P`` bidders' values once
and each auction's bidders from the pool with the simulator's bidder-id rule (values persist across
days; intervals clustered by bidder). Seeded per replicate (``SeedSequence([seed, replicate])``).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import stats

from ._lstatistic import l_statistic
from .allocation import allocation_rule, mixture_rule
from .errors import InputError
from .sequential import anytime_multiplier
from .simulate import equilibrium_bid_function
from .spec import Experiment
from .study import _increments

__all__ = ["DayPiece", "LookPath", "PeekingSetup", "day_piece", "detection_day", "first_exclusion", "look_path",
           "peeking_study"]


@dataclass(frozen=True)
class PeekingSetup:
    """One experiment's traffic: ``n_bidders`` per auction, ``auctions_per_day``, values, bidder pool."""

    experiment: Experiment
    values: object  # scipy.stats frozen distribution
    n_bidders: int
    auctions_per_day: int
    pool: int | None = None

    def __post_init__(self):
        if len(self.experiment.arms) != 2:
            raise InputError("peeking setup: the experiment must have two arms (control and one other)")
        if self.pool is not None and self.pool < self.n_bidders:
            raise InputError(f"peeking setup: `pool` ({self.pool}) must be at least n_bidders ({self.n_bidders})")

    @property
    def cluster(self) -> str:
        return "auction" if self.pool is None else "bidder"


@dataclass(frozen=True)
class DayPiece:
    """What one day's single stratum contributes: per-arm revenue, CR0 covariance, bidder sums."""

    n_auctions: int
    estimate: np.ndarray  # (2,) control, other arm
    covariance: np.ndarray  # (2, 2) sum over auctions of S_c S_c'
    bidder_sums: np.ndarray | None  # (pool, 2) sum of IF / N per bidder
    bidder_seen: np.ndarray | None  # (pool,) whether the bidder bid that day


class _Day:
    """The setup's fixed parts: bid function, weights of both arms at the day's N bids."""

    def __init__(self, setup: PeekingSetup):
        n, exp = setup.n_bidders, setup.experiment
        rules = [allocation_rule(a.weights_for(n), n) for a in exp.arms]
        mix = mixture_rule(rules, exp.shares)
        self.bid_of_quantile = equilibrium_bid_function(setup.values, mix)
        big_n = n * setup.auctions_per_day
        mix_key = tuple(mix.position_weights.tolist())
        control = exp.arm_names.index(exp.control_arm)
        order = (control, 1 - control)  # control first
        self.weights = [_increments(tuple(rules[k].position_weights.tolist()), mix_key, big_n) for k in order]
        self.setup = setup


def day_piece(setup: PeekingSetup, rng: np.random.Generator, *, values_of_pool: np.ndarray | None = None,
              _fixed: _Day | None = None) -> tuple[DayPiece, np.ndarray, np.ndarray]:
    """Simulate and estimate one day.

    Parameters
    ----------
    setup : PeekingSetup
    rng : numpy.random.Generator
    values_of_pool : ndarray, optional
        Quantiles of the pool's bidders (``setup.pool`` of them), drawn once per replicate.

    Returns
    -------
    (DayPiece, bids, bidder)
        The piece, and the day's bids and bidder ids as ``(auctions, n_bidders)`` arrays (for the
        tests' comparison with ``stratum_pieces``).
    """
    fixed = _fixed or _Day(setup)
    n, a = setup.n_bidders, setup.auctions_per_day
    if setup.pool is None:
        bidder = np.arange(a * n).reshape(a, n)  # every bid its own bidder
        bids = fixed.bid_of_quantile(rng.random((a, n)))
    else:  # the simulator's rule: consecutive ids from a random offset, distinct within an auction
        bidder = (rng.integers(0, setup.pool, size=(a, 1)) + np.arange(n)[None, :]) % setup.pool
        bids = fixed.bid_of_quantile(values_of_pool)[bidder]
    flat = bids.ravel()
    order = np.argsort(flat, kind="stable")
    b = flat[order]
    auction = np.repeat(np.arange(a), n)[order]
    big_n = b.size
    est = np.empty(2)
    sums = np.empty((a, 2))
    bsums = None if setup.pool is None else np.empty((setup.pool, 2))
    influence = np.empty(big_n)
    for k, (inc, top, bottom) in enumerate(fixed.weights):
        est[k] = l_statistic(lambda lo, hi, inc=inc: n * inc[lo:hi], b, influence) - n * bottom * float(b[0]) \
            + n * top * float(b[-1])
        influence /= big_n
        sums[:, k] = np.bincount(auction, weights=influence, minlength=a)
        if bsums is not None:
            bsums[:, k] = np.bincount(bidder.ravel()[order], weights=influence, minlength=setup.pool)
    seen = None if bsums is None else np.bincount(bidder.ravel(), minlength=setup.pool) > 0
    return DayPiece(a, est, sums.T @ sums, bsums, seen), bids, bidder


@dataclass(frozen=True)
class LookPath:
    """One replicate's to-date lift (and control revenue) at each of its daily looks."""

    lift: np.ndarray
    lift_se: np.ndarray
    control: np.ndarray
    control_se: np.ndarray
    units: np.ndarray  # auctions to date


def _cr(g: np.ndarray) -> np.ndarray:
    return g / (g - 1.0)


def look_path(pieces: Sequence[DayPiece], *, cluster: str) -> LookPath:
    """Combine days 1..d for every d, as ``combine_pieces`` does (one stratum per day).

    Parameters
    ----------
    pieces : sequence of DayPiece
        The days in order (control first in each piece's columns).
    cluster : {'auction', 'bidder'}

    Returns
    -------
    LookPath
    """
    m = np.array([p.n_auctions for p in pieces], dtype=float)
    cum = np.cumsum(m)
    est = np.cumsum(m[:, None] * np.stack([p.estimate for p in pieces]), axis=0) / cum[:, None]
    t_c, t_a = est[:, 0], est[:, 1]
    r = t_a / t_c
    if cluster == "auction":
        cov = np.cumsum((m * m)[:, None, None] * np.stack([p.covariance for p in pieces]), axis=0)
        cov *= (_cr(cum) / (cum * cum))[:, None, None]
        lift_var = (cov[:, 1, 1] - 2 * r * cov[:, 1, 0] + r * r * cov[:, 0, 0]) / (t_c * t_c)
        control_var = cov[:, 0, 0]
    elif cluster == "bidder":
        running = np.cumsum(m[:, None, None] * np.stack([p.bidder_sums for p in pieces]), axis=0)
        seen = np.cumsum(np.stack([p.bidder_seen for p in pieces]), axis=0) > 0
        g = seen.sum(axis=1).astype(float)
        totals = running / cum[:, None, None]
        cs = (totals[:, :, 1] - r[:, None] * totals[:, :, 0]) / t_c[:, None]
        lift_var = _cr(g) * np.einsum("dp,dp->d", cs, cs)
        control_var = _cr(g) * np.einsum("dp,dp->d", totals[:, :, 0], totals[:, :, 0])
    else:
        raise InputError(f"`cluster` must be 'auction' or 'bidder'; got {cluster!r}")
    return LookPath(r - 1.0, np.sqrt(lift_var), t_c, np.sqrt(control_var), cum)


def peeking_study(setup: PeekingSetup, *, looks: int, reps: int, planned_days: int, seed: int = 0,
                  confidence_level: float = 0.95) -> dict[str, np.ndarray]:
    """Every replicate's to-date lift at each look, and whether each look's intervals cover.

    Parameters
    ----------
    setup : PeekingSetup
    looks : int
        Days combined at the last look (one look a day).
    reps : int
    planned_days : int
        The anytime-valid bounds are tuned for ``planned_days x auctions_per_day`` auctions.
    seed : int
    confidence_level : float

    Returns
    -------
    dict of str to ndarray
        ``lift``, ``lift_se``, ``control``, ``control_se`` (reps x looks), ``units`` (looks),
        ``z`` (the fixed intervals' multiplier) and ``m`` (the anytime bounds' multiplier per look).
    """
    if looks < 1 or reps < 1 or planned_days < 1:
        raise InputError("peeking study: `looks`, `reps` and `planned_days` must be >= 1")
    fixed = _Day(setup)
    out = {k: np.empty((reps, looks)) for k in ("lift", "lift_se", "control", "control_se")}
    for rep in range(reps):
        rng = np.random.default_rng(np.random.SeedSequence([seed, rep]))
        pool = None if setup.pool is None else rng.random(setup.pool)
        pieces = [day_piece(setup, rng, values_of_pool=pool, _fixed=fixed)[0] for _ in range(looks)]
        path = look_path(pieces, cluster=setup.cluster)
        for k in out:
            out[k][rep] = getattr(path, k)
    units = np.arange(1, looks + 1) * float(setup.auctions_per_day)
    out["units"] = units
    out["z"] = np.array(float(stats.norm.ppf(0.5 + confidence_level / 2)))
    out["m"] = anytime_multiplier(units / (planned_days * setup.auctions_per_day), confidence_level=confidence_level)
    return out


def first_exclusion(estimate: np.ndarray, std_error: np.ndarray, multiplier, truth: float, looks: int) -> np.ndarray:
    """Per replicate, whether some look among the first ``looks`` has an interval excluding ``truth``.

    Parameters
    ----------
    estimate, std_error : ndarray
        Replicates x looks.
    multiplier : float or ndarray
        Half width in standard errors: one number (fixed interval) or one per look.
    truth : float
    looks : int

    Returns
    -------
    numpy.ndarray of bool
        One per replicate.
    """
    half = np.broadcast_to(multiplier, estimate.shape) * std_error
    out = np.abs(estimate - truth) > half
    return out[:, :looks].any(axis=1)


def detection_day(estimate: np.ndarray, std_error: np.ndarray, multiplier) -> np.ndarray:
    """Per replicate, the first look (1-based) whose lower bound is above 0; ``inf`` if none.

    Parameters
    ----------
    estimate, std_error : ndarray
        Replicates x looks.
    multiplier : float or ndarray
        Half width in standard errors: one number or one per look.

    Returns
    -------
    numpy.ndarray of float
    """
    half = np.broadcast_to(multiplier, estimate.shape) * std_error
    above = estimate - half > 0
    first = np.argmax(above, axis=1).astype(float) + 1
    first[~above.any(axis=1)] = math.inf
    return first
