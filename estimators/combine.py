"""Many strata into one result: validate the pieces, combine them by auction counts, form the rows.

:func:`combine_pieces` turns any set of :class:`~.pieces.StratumPiece` -- the strata of one day,
the shards of one stratum, the stored pieces of every day of an experiment -- into the frozen
:class:`ArmEstimates` that :func:`~counterbid.estimators.estimate_arms` returns. One function per
step, with ``M_s`` the auctions of stratum ``s``, ``M = sum_s M_s`` and ``pi_s = M_s / M``:

* :func:`_estimates`: ``T = sum_s pi_s T_s`` for every linear quantity (revenue and welfare per
  arm, the mixture's revenue), pieces brought to a common power-of-two unit;
* :func:`_auction_block`: ``Var T = G/(G-1) sum_s pi_s^2 C_s`` with ``C_s`` the stratum's CR0
  covariance and ``G = M`` auctions;
* :func:`_bidder_block`: each bidder's influence sums added across strata first,
  ``S_b = sum_s pi_s S_{b,s}``, then ``Var T = G/(G-1) sum_b S_b S_b'`` with ``G`` the distinct
  bidders of all pieces;
* :func:`_lift`: a ratio of revenues by the delta method, from the combined covariance (or the
  combined bidder sums);
* the realized per-arm average from per-stratum sufficient sums (:func:`._realized.combine_realized`,
  exact: Chan, Golub & LeVeque 1983);
* :func:`_rows`: one row per arm and metric with its status flags, then :func:`_in_bid_units`.

References
----------
.. [1] Serfling, R. (1980). Approximation Theorems of Mathematical Statistics, Wiley, sec. 8.2.
.. [2] Cameron, A. C. & Miller, D. L. (2015). A practitioner's guide to cluster-robust inference.
   J. Human Resources 50(2), 317-372.
.. [3] Chan, T. F., Golub, G. H. & LeVeque, R. J. (1983). Algorithms for computing the sample
   variance: analysis and recommendations. The American Statistician 37(3), 242-247.
"""

from __future__ import annotations

import dataclasses
import math
import warnings
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import special

from ._ids import ids_as_text
from ._realized import RealizedAverages, combine_realized
from ._validate import check_cluster, check_confidence_level, check_experiment
from .constants import METHOD_VERSION, MIN_STRATUM_BIDS, MIXTURE_ARM, RESULT_COLUMNS, REVENUE, WELFARE, piece_labels
from .errors import EstimatorWarning, InputError
from .pieces import StratumPiece
from .spec import Experiment
from .support import MIN_EFFECTIVE_BIDS, effective_share

__all__ = ["ArmEstimates", "BidderGram", "combine_pieces"]


@dataclass(frozen=True)
class ArmEstimates:
    """Per-arm estimates and what they were computed with (what ``estimate_arms`` and ``combine_pieces`` return).

    Attributes
    ----------
    table : pandas.DataFrame
        One row per arm and metric, columns :data:`~counterbid.estimators.RESULT_COLUMNS`
        (read it; :meth:`to_frame` gives a copy to change).
    experiment_id : str
    confidence_level : float
        Two-sided level of the intervals.
    cluster : {'auction', 'bidder'}
        The unit the standard errors were clustered on (``auto`` resolved).
    n_auctions, n_bids : int
        Auctions and bids estimated from (single-bidder auctions left out).
    n_excluded_auctions : int
        Single-bidder auctions left out.
    strata : mapping of int to int
        Auctions per number of bidders.
    method_version : str
        :data:`~counterbid.estimators.METHOD_VERSION`.
    welfare_identified : bool
    payment_rule : str
        The payment rule of the auctions that ran.
    floor : float
        The spec's floor (0: none).
    quality : bool
        Whether bids were ranked as bid x quality.
    shards : int
        Shards the input was estimated in (1 unless an engine split it).
    engine : str
        ``'local'`` or ``'spark'``.
    segments : mapping of str to int
        Auctions per segment label, when the strata are segmented (empty otherwise). The table
        then holds, after the pooled rows (``segment`` null), the same rows for each segment.
    """

    table: pd.DataFrame
    experiment_id: str
    confidence_level: float
    cluster: str
    n_auctions: int
    n_bids: int
    n_excluded_auctions: int
    strata: Mapping[int, int]
    method_version: str
    welfare_identified: bool
    payment_rule: str
    floor: float
    quality: bool
    shards: int = 1
    engine: str = "local"
    segments: Mapping[str, int] = dataclasses.field(default_factory=dict)

    def to_frame(self) -> pd.DataFrame:
        """A copy of :attr:`table` (the caller may add columns)."""
        return self.table.copy()

    def rows(self, metric: str) -> pd.DataFrame:
        """The pooled rows of one metric (every segment together), indexed by arm."""
        return self.table[(self.table["metric"] == metric) & self.table["segment"].isna()].set_index("arm")

    def segment_rows(self, metric: str) -> pd.DataFrame:
        """The per-segment rows of one metric, indexed by (segment, arm); empty when not segmented."""
        t = self.table
        return t[(t["metric"] == metric) & t["segment"].notna()].set_index(["segment", "arm"])

    def on(self, *, shards: int | None = None, engine: str | None = None) -> ArmEstimates:
        """The same estimates, recording the shards and engine that produced them."""
        return dataclasses.replace(self, shards=self.shards if shards is None else int(shards),
                                   engine=self.engine if engine is None else engine)


@dataclass(frozen=True)
class BidderGram:
    """What bidder clustering needs of the bidder sums, kept as running totals.

    With ``U_b = sum_s M_s 2**(e_s - bid_exponent) S_{b,s}`` (each bidder's influence sums weighted
    by the auctions of their stratum, not yet divided by the total ``M``), :attr:`gram` is
    ``sum_b U_b U_b'`` over the distinct bidders, revenue labels in the order of
    :attr:`StratumPiece.bidder_sums` (each arm, then the mixture). ``combine_pieces`` scales it by
    ``1 / M**2`` (``S_b = U_b / M``): the covariance and the lift's variance follow without the
    per-bidder rows (``docs/method.md``, "Strata, shards and the experiment to date").

    Attributes
    ----------
    gram : numpy.ndarray
        ``(K + 1, K + 1)``, symmetric.
    n_bidders : int
        Distinct bidders ``B`` of the sums (the factor ``B / (B - 1)``).
    bid_exponent : int
        Unit of ``U_b``: ``2**bid_exponent`` bids.
    """

    gram: np.ndarray
    n_bidders: int
    bid_exponent: int


def combine_pieces(pieces: Iterable[StratumPiece], experiment: Experiment, *, confidence_level: float = 0.95,
                   cluster: str = "auto", n_excluded_auctions: int = 0, source: str = "bids",
                   bidder_gram: BidderGram | None = None,
                   segment_grams: Mapping[str, BidderGram] | None = None) -> ArmEstimates:
    """Combine stratum pieces by their auction counts into per-arm estimates.

    Parameters
    ----------
    pieces : iterable of StratumPiece
        Pieces of independent strata (distinct auctions): the strata of one input, the shards of
        a stratum, the pieces of several days. Pieces with the same key (:class:`~.pieces.StratumKey`) are
        refused (the same stratum twice).
    experiment : Experiment
        The experiment the pieces were estimated for (their labels must be its arms).
    confidence_level : float, optional
        Two-sided level of the normal intervals, in (0, 1). Default 0.95.
    cluster : {'auto', 'auction', 'bidder'}, optional
        ``'auction'``: variances add across strata. ``'bidder'``: per-bidder sums are added across
        strata (matched on bidder id) before squaring; every piece must carry them. ``'auto'``
        (default): ``'bidder'`` when every piece carries bidder sums and some bidder id appears in
        more than one auction (more bids than distinct bidders), else ``'auction'``.
    n_excluded_auctions : int, optional
        Single-bidder auctions left out upstream (reported in the result).
    source : str, optional
        Name of the input in warnings and errors.
    bidder_gram : BidderGram, optional
        The bidder sums of these pieces as running totals (``operators/window_state.py`` keeps
        them for the experiment to date): bidder clustering reads it instead of the pieces'
        bidder sums, which the pieces then need not carry. It must describe exactly these pieces.
    segment_grams : mapping of str to BidderGram, optional
        The same per segment label (segmented pieces only): each describes exactly that segment's
        pieces. A segment without one is clustered from its pieces' bidder sums.

    Returns
    -------
    ArmEstimates
        The rows (:data:`~counterbid.estimators.RESULT_COLUMNS`, ``status``) and what they were
        computed with, as :func:`~counterbid.estimators.estimate_arms` (``strata`` sums the
        auctions of pieces with the same number of bidders).

    Warns
    -----
    EstimatorWarning
        Strata below ``MIN_STRATUM_BIDS`` bids, welfare without interval, welfare not identified.

    Notes
    -----
    With ``pi_s = M_s / M``: ``T = sum_s pi_s T_s``; auction clustering
    ``Var T = M/(M-1) sum_s pi_s^2 C_s`` (``C_s`` the pieces' CR0 covariance); bidder clustering
    ``Var T = B/(B-1) sum_b (sum_s pi_s S_{b,s})^2`` over the ``B`` distinct bidders. The lift
    ``T_a / T_c - 1`` has variance ``(V_aa - 2 r V_ac + r^2 V_cc) / T_c^2``, ``r = T_a / T_c`` (the
    delta method; with bidder clustering computed from the combined bidder sums). The realized
    per-arm average is ``sum_s R_{s,k} / sum_s A_{s,k}`` with the squared deviations combined
    exactly [3]_ and the factor ``M/(M-1)``. With the strata of one input this reproduces
    ``estimate_arms`` on the whole input (to rounding).

    References
    ----------
    .. [1] Serfling, R. (1980). Approximation Theorems of Mathematical Statistics, Wiley, sec. 8.2.
    .. [2] Cameron, A. C. & Miller, D. L. (2015). A practitioner's guide to cluster-robust
       inference. J. Human Resources 50(2), 317-372.
    .. [3] Chan, T. F., Golub, G. H. & LeVeque, R. J. (1983). Algorithms for computing the sample
       variance. The American Statistician 37(3), 242-247.
    """
    check_experiment(experiment)
    confidence_level = check_confidence_level(confidence_level)
    check_cluster(cluster)
    pieces = _checked_pieces(pieces, experiment, source)
    _refuse_nothing_eligible(pieces, experiment, source)
    cluster, _ = _cluster_unit(pieces, cluster, source, bidder_gram)
    welfare_identified = _warn_about(pieces, source)
    table = _table(pieces, experiment, cluster, confidence_level, welfare_identified, source, segment=None,
                   gram=bidder_gram)
    segments = _segments_of(pieces, source)
    if segments:
        grams = _segment_grams(segments, segment_grams, cluster, source)
        parts = [table] + [
            _table(group, experiment, cluster, confidence_level,
                   not any("not_identified" in p.flags for p in group), source, segment=name, gram=grams.get(name))
            for name, group in segments.items()]
        table = pd.concat(parts, ignore_index=True)
    return ArmEstimates(
        table=table, experiment_id=experiment.id, confidence_level=confidence_level, cluster=cluster,
        n_auctions=int(sum(p.n_auctions for p in pieces)), n_bids=int(sum(p.n_bids for p in pieces)),
        n_excluded_auctions=int(n_excluded_auctions), strata=_strata_counts(pieces), method_version=METHOD_VERSION,
        welfare_identified=welfare_identified, payment_rule=experiment.payment_rule,
        floor=float(experiment.floor or 0.0), quality=any(p.has_quality for p in pieces),
        segments={name: int(sum(p.n_auctions for p in group)) for name, group in segments.items()})


def _table(pieces: Sequence[StratumPiece], experiment: Experiment, cluster: str, confidence_level: float,
           welfare_identified: bool, source: str, *, segment: str | None, gram: BidderGram | None) -> pd.DataFrame:
    """The rows of one combination of pieces (all of them: the pooled rows; one segment's: its rows)."""
    labels = piece_labels(experiment)
    k_arms, k_targets = len(experiment.arms), len(experiment.targets)
    revenue_cols = list(range(k_targets)) + [len(labels) - 1]
    w, exponent = _weights(pieces)
    estimate = _estimates(pieces, w)
    totals = scale = sums_gram = None
    if cluster == "bidder" and gram is not None:
        sums_gram = _scaled_gram(gram, pieces, exponent, len(revenue_cols), source)
        block = _cr_factor(gram.n_bidders) * sums_gram if gram.n_bidders >= 2 else \
            np.full_like(sums_gram, np.nan)
    elif cluster == "bidder":
        block, totals, scale = _bidder_block(pieces, w, len(revenue_cols))
    else:
        block = _auction_block(pieces, w, revenue_cols)
    variance = np.full((len(labels), len(labels)), np.nan)
    variance[np.ix_(revenue_cols, revenue_cols)] = block
    if any("degenerate" in p.flags for p in pieces):
        estimate[:] = np.nan
    if all(p.below_floor for p in pieces):  # a segment without an eligible bid (a day's are refused): 0, no interval
        variance[:] = np.nan
    support = _support(pieces, w, k_arms)
    for j in np.flatnonzero(support.thin):  # no number for a layout the bids say too little about
        estimate[[k_arms + j, k_targets + k_arms + j]] = np.nan
    unit = np.array([math.ldexp(1.0, p.bid_exponent - exponent) for p in pieces])
    realized = combine_realized([(p.realized_sum, p.realized_squares, p.arm_auctions, p.n_bidders) for p in pieces],
                                unit)
    control = experiment.arm_names.index(experiment.control_arm)
    if sums_gram is not None:
        lifts = {k: _gram_lift(estimate, sums_gram, gram.n_bidders, k, control, revenue_cols)
                 for k in range(k_targets)}
    else:
        lifts = {k: _lift(estimate, variance, k, control, revenue_cols, totals, scale) for k in range(k_targets)}
    table = _rows(pieces, experiment, estimate, variance, lifts, realized, confidence_level, welfare_identified,
                  support, segment)
    return _in_bid_units(table, exponent, pieces, source)


def _segment_grams(segments: Mapping[str, Sequence[StratumPiece]], grams: Mapping[str, BidderGram] | None,
                   cluster: str, source: str) -> Mapping[str, BidderGram]:
    """The running bidder totals of each segment; under bidder clustering a segment without them needs bidder sums."""
    grams = dict(grams or {})
    unknown = sorted(set(grams) - set(segments))
    if unknown:
        raise InputError(f"{source}: bidder totals of segment {unknown[0]!r}, which has no pieces")
    for name, group in segments.items():
        if cluster == "bidder" and name not in grams and any(p.bidder_sums is None for p in group):
            raise InputError(f"{source}: segment {name!r} has neither bidder totals nor bidder sums in every piece; "
                             "bidder clustering needs one of them")
    return grams


def _segments_of(pieces: Sequence[StratumPiece], source: str) -> dict[str, list[StratumPiece]]:
    """The pieces of each segment, by segment label ({} when no piece is segmented); mixing is refused."""
    named = [p for p in pieces if p.key.segment is not None]
    if not named:
        return {}
    if len(named) != len(pieces):
        plain = next(p for p in pieces if p.key.segment is None)
        raise InputError(f"{source}: the piece of {plain.key.describe()} has no segment while others have one; "
                         "estimate every stratum with the same segments to combine them")
    out: dict[str, list[StratumPiece]] = {}
    for p in sorted(pieces, key=lambda p: p.key.segment):
        out.setdefault(p.key.segment, []).append(p)
    return out


@dataclass(frozen=True)
class _Support:
    """Per what-if layout: its effective share (NaN: unbounded weights) and whether it gets no number."""

    share: np.ndarray
    thin: np.ndarray


def _support(pieces: Sequence[StratumPiece], w: np.ndarray, k_arms: int) -> _Support:
    """Effective share of each what-if layout over the strata, and the ``thin_support`` mask.

    ``sum_s w_s^2 V_own,s / sum_s w_s^2 C_s`` (the ``M/(M-1)`` factors cancel): the variance of the
    layout's weights with itself as the mixture over that of its estimate, both auction-clustered
    on the same bids (:func:`~.support.effective_share`). A layout is thin when its weights are
    unbounded in some stratum, or when its effective bids (share x bids) fall below
    :data:`~.support.MIN_EFFECTIVE_BIDS`.
    """
    n_what_if = pieces[0].n_targets - k_arms
    if n_what_if == 0:
        return _Support(np.empty(0), np.zeros(0, dtype=bool))
    own = sum((wi * wi) * p.own_variance for p, wi in zip(pieces, w))
    var = sum((wi * wi) * np.diagonal(p.covariance)[k_arms:k_arms + n_what_if] for p, wi in zip(pieces, w))
    share = np.array([effective_share(float(a), float(b)) for a, b in zip(own, var)])
    n_bids = sum(p.n_bids for p in pieces)
    with np.errstate(invalid="ignore"):
        thin = ~(share * n_bids >= MIN_EFFECTIVE_BIDS)
    return _Support(share, thin)


def _checked_pieces(pieces: Iterable[StratumPiece], experiment: Experiment, source: str) -> list[StratumPiece]:
    """The pieces as a list: StratumPiece objects of the experiment's arms, no key twice, at least one."""
    pieces = list(pieces)
    if not pieces:
        raise InputError(f"{source}: no stratum pieces to combine")
    labels = piece_labels(experiment)
    seen = set()
    for p in pieces:
        if not isinstance(p, StratumPiece):
            raise InputError(f"{source}: pieces must be StratumPiece objects; got {type(p).__name__}")
        if p.labels != labels:
            raise InputError(f"{source}: piece of {p.key.describe()} has labels of other arms than experiment "
                             f"{experiment.id!r} ({', '.join(experiment.arm_names)})")
        if p.key in seen:
            raise InputError(f"{source}: two pieces of {p.key.describe()} (the same stratum twice)")
        seen.add(p.key)
    return pieces


def _refuse_nothing_eligible(pieces: Sequence[StratumPiece], experiment: Experiment, source: str) -> None:
    """Refuse pieces none of which holds a bid at or above the floor (every ``q* = 1``).

    Each such piece is an honest 0 with zero influence, but all of them together would publish
    revenue 0 with a zero-width interval, which the bids cannot support (``q* = 1`` is estimated
    with variance ``q*(1 - q*)/N = 0``), and the lift would be 0/0 (docs/method.md).
    """
    if not experiment.floor or not all(p.below_floor for p in pieces):
        return
    what = "effective bid (bid x quality)" if any(p.has_quality for p in pieces) else "bid"
    days = sorted({p.key.day for p in pieces if p.key.day is not None})
    when = "" if not days else f" on {days[0]}" if len(days) == 1 else f" on {days[0]} to {days[-1]}"
    largest = max(float(p.max_bid) for p in pieces)
    raise InputError(f"{source}: the floor {float(experiment.floor)!r} lies above every {what} of experiment "
                     f"{experiment.id!r}{when} (largest {largest!r}, {sum(p.n_bids for p in pieces)} bids); "
                     "nothing is eligible to estimate from")


def _weights(pieces: Sequence[StratumPiece]) -> tuple[np.ndarray, int]:
    """Each piece's weight ``pi_s`` times its unit in the common unit, and the common unit's exponent."""
    counts = np.array([p.n_auctions for p in pieces], dtype=np.int64)
    pi = counts / int(counts.sum())
    exponent = max(p.bid_exponent for p in pieces)
    unit = np.array([math.ldexp(1.0, p.bid_exponent - exponent) for p in pieces])  # piece unit in the common unit
    return pi * unit, exponent


def _estimates(pieces: Sequence[StratumPiece], w: np.ndarray) -> np.ndarray:
    estimate = np.zeros(len(pieces[0].labels))
    for p, wi in zip(pieces, w):
        estimate += wi * p.estimate
    return estimate


def _cluster_unit(pieces: Sequence[StratumPiece], cluster: str, source: str,
                  gram: BidderGram | None = None) -> tuple[str, int | None]:
    """The clustering used: ``bidder`` needs bidder sums in every piece; ``auto`` is bidder when they repeat."""
    if gram is not None:
        if cluster == "auto":
            cluster = "bidder" if gram.n_bidders < sum(p.n_bids for p in pieces) else "auction"
        return cluster, int(gram.n_bidders)
    with_sums = all(p.bidder_sums is not None for p in pieces)
    if cluster == "bidder" and not with_sums:
        lacking = next(p for p in pieces if p.bidder_sums is None)
        raise InputError(f"{source}: the piece of {lacking.key.describe()} has no bidder sums; estimate its stratum "
                         "with cluster='bidder' to combine with bidder clustering")
    n_distinct = _distinct_bidders(pieces) if with_sums and cluster != "auction" else None
    if cluster == "auto":
        cluster = "bidder" if with_sums and n_distinct < sum(p.n_bids for p in pieces) else "auction"
    return cluster, n_distinct


def _auction_block(pieces: Sequence[StratumPiece], w: np.ndarray, revenue_cols: list[int]) -> np.ndarray:
    """Covariance of the revenue labels clustered by auction: ``M/(M-1) sum_s w_s^2 C_s``."""
    block = np.zeros((len(revenue_cols), len(revenue_cols)))
    for p, wi in zip(pieces, w):
        block += (wi * wi) * p.covariance[np.ix_(revenue_cols, revenue_cols)]
    block *= _cr_factor(int(sum(p.n_auctions for p in pieces)))
    return block


def _bidder_block(pieces: Sequence[StratumPiece], w: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray, float]:
    """Covariance of the revenue labels clustered by bidder, and the bidder totals ``S = scale * totals``."""
    totals, scale = _bidder_totals(pieces, w)  # distinct bidders x revenue labels
    factor = _cr_factor(totals.shape[0])
    if totals.shape[0] >= 2:
        return (factor * scale * scale) * (totals.T @ totals), totals, scale
    return np.full((size, size), np.nan), totals, scale


def _scaled_gram(gram: BidderGram, pieces: Sequence[StratumPiece], exponent: int, size: int,
                 source: str) -> np.ndarray:
    """``sum_b S_b S_b'`` in the common unit: the running ``sum_b U_b U_b'`` times ``(2**(e - exponent) / M)**2``."""
    matrix = np.asarray(gram.gram, dtype=float)
    if matrix.shape != (size, size):
        raise InputError(f"{source}: bidder totals have {matrix.shape} revenue labels; the pieces have {size}")
    scale = math.ldexp(1.0, gram.bid_exponent - exponent) / int(sum(p.n_auctions for p in pieces))
    return (scale * scale) * matrix


def _gram_lift(estimate: np.ndarray, sums_gram: np.ndarray, n_bidders: int, k: int, control: int,
               revenue_cols: list[int]) -> tuple[float, float]:
    """:func:`_lift` from ``sum_b S_b S_b'``: ``sum_b (S_bk - r S_bc)^2 = G_kk - 2 r G_kc + r^2 G_cc``."""
    t_a, t_c = estimate[k], estimate[control]
    if k == control or not (np.isfinite(t_a) and np.isfinite(t_c) and t_c > 0):
        return np.nan, np.nan
    r = t_a / t_c
    i, c = revenue_cols.index(k), revenue_cols.index(control)
    v = sums_gram[i, i] - 2 * r * sums_gram[i, c] + r * r * sums_gram[c, c]
    if n_bidders < 2:
        return t_a / t_c - 1.0, np.nan
    return t_a / t_c - 1.0, float(np.sqrt(_cr_factor(n_bidders) * max(v, 0.0))) / t_c


def _lift(estimate: np.ndarray, variance: np.ndarray, k: int, control: int, revenue_cols: list[int],
          totals: np.ndarray | None, scale: float | None) -> tuple[float, float]:
    """``T_k / T_c - 1`` and its standard error by the delta method (NaN unless both revenues are finite, T_c > 0)."""
    t_a, t_c = estimate[k], estimate[control]
    if k == control or not (np.isfinite(t_a) and np.isfinite(t_c) and t_c > 0):
        return np.nan, np.nan
    r = t_a / t_c
    if totals is not None:
        cs = totals[:, revenue_cols.index(control)] * -r
        cs += totals[:, revenue_cols.index(k)]
        cs *= scale / t_c
        return t_a / t_c - 1.0, float(np.sqrt(_cr_factor(cs.size) * float(cs @ cs))) if cs.size >= 2 else np.nan
    v = variance[k, k] - 2 * r * variance[k, control] + r * r * variance[control, control]
    return t_a / t_c - 1.0, float(np.sqrt(max(v, 0.0))) / t_c if np.isfinite(v) else np.nan


def _warn_about(pieces: Sequence[StratumPiece], source: str) -> bool:
    """Warn about thin strata and unidentified welfare; whether welfare is identified."""
    few = [p for p in pieces if "few_bids" in p.flags]
    if few:
        _warn(f"{source}: strata with fewer than {MIN_STRATUM_BIDS} bids ({_place(few)}): their confidence intervals "
              "under-cover (status 'few_bids'); pool more auctions before reading them")
    welfare_identified = not any("not_identified" in p.flags for p in pieces)
    # Welfare is always published without an interval (the spread of the highest bid, which welfare
    # weighs with a point mass, makes normal intervals under-cover): a fixed property, carried by
    # the status flag 'no_interval' and the report's assumptions, not a warning on every run.
    if not welfare_identified:
        _warn("welfare is not identified: the mixture's top two positions weigh the same "
              "(or its bottom positions do), so values at that end cannot be recovered from bids")
    return welfare_identified


def _rows(pieces: Sequence[StratumPiece], experiment: Experiment, estimate: np.ndarray, variance: np.ndarray,
          lifts: Mapping[int, tuple[float, float]], realized: RealizedAverages, confidence_level: float,
          welfare_identified: bool, support: _Support, segment: str | None) -> pd.DataFrame:
    """One row per arm and metric (what-if layouts after the arms, then the mixture's two), with status flags."""
    k_arms, k_targets = len(experiment.arms), len(experiment.targets)
    total_auctions = int(sum(p.n_auctions for p in pieces))
    total_bids = int(sum(p.n_bids for p in pieces))
    degenerate = any("degenerate" in p.flags for p in pieces)
    stratum_flags = (["few_bids"] if any("few_bids" in p.flags for p in pieces) else []) + \
        (["degenerate"] if degenerate else [])
    z = float(special.ndtri(0.5 + confidence_level / 2))  # the normal quantile (scipy.stats.norm.ppf)
    rows: list[tuple] = []

    def emit(arm: str, metric: str, est: float, se: float, n_auc: int, n_b: int, *, counterfactual: bool = True,
             flags: tuple[str, ...] = (), what_if: bool = False, share: float = np.nan) -> None:
        status = (list(stratum_flags) if counterfactual else []) + list(flags)
        if np.isfinite(est) and not np.isfinite(se):
            status.append("no_interval")
        rows.append((arm, segment, metric, est, se, est - z * se, est + z * se, n_auc, n_b, ",".join(status) or "ok",
                     what_if, share))

    def se_of(i: int) -> float:
        return float(np.sqrt(variance[i, i])) if np.isfinite(estimate[i]) else np.nan

    control = experiment.arm_names.index(experiment.control_arm)
    for k, a in enumerate(experiment.arms):
        emit(a.name, REVENUE, float(estimate[k]), se_of(k), total_auctions, total_bids)
        emit(a.name, WELFARE, float(estimate[k_targets + k]), np.nan, total_auctions, total_bids,
             flags=() if welfare_identified or degenerate else ("not_identified",))
        emit(a.name, "realized_revenue_per_auction", float(realized.mean[k]), float(realized.std_error[k]),
             int(realized.auctions[k]), int(realized.bids[k]), counterfactual=False,
             flags=() if realized.auctions[k] else ("no_auctions",))
        if k != control:
            emit(a.name, "revenue_lift_vs_control", *lifts[k], total_auctions, total_bids)
    for j, layout in enumerate(experiment.what_if):
        k = k_arms + j
        mark = {"what_if": True, "share": float(support.share[j]),
                "flags": ("thin_support",) if support.thin[j] else ()}
        emit(layout.name, REVENUE, float(estimate[k]), se_of(k), total_auctions, total_bids, **mark)
        welfare_flags = mark["flags"] + (() if welfare_identified or degenerate or support.thin[j]
                                         else ("not_identified",))
        emit(layout.name, WELFARE, float(estimate[k_targets + k]), np.nan, total_auctions, total_bids,
             **{**mark, "flags": welfare_flags})
        emit(layout.name, "revenue_lift_vs_control", *lifts[k], total_auctions, total_bids, **mark)
    emit(MIXTURE_ARM, REVENUE, float(estimate[-1]), se_of(len(estimate) - 1), total_auctions, total_bids)
    emit(MIXTURE_ARM, "realized_revenue_per_auction", realized.mixture_mean, realized.mixture_std_error,
         total_auctions, total_bids, counterfactual=False)
    out = pd.DataFrame(rows, columns=list(RESULT_COLUMNS))
    out["n_auctions"] = out["n_auctions"].astype("int64")
    out["n_bids"] = out["n_bids"].astype("int64")
    out["segment"] = out["segment"].astype(object)
    out["what_if"] = out["what_if"].astype(bool)
    out["effective_share"] = out["effective_share"].astype(float)
    return out


def _in_bid_units(out: pd.DataFrame, exponent: int, pieces: Sequence[StratumPiece], source: str) -> pd.DataFrame:
    """The rows in bid units (the common unit is ``2**exponent`` bids); lifts are ratios and stay."""
    if not exponent:
        return out
    in_bid_units = (out["metric"] != "revenue_lift_vs_control").to_numpy()
    cols = ["estimate", "std_error", "ci_low", "ci_high"]
    values = out.loc[in_bid_units, cols].to_numpy()
    with np.errstate(over="ignore"):
        scaled = np.ldexp(values, exponent)
    if np.any(np.isfinite(values) & ~np.isfinite(scaled)):
        top_bid = max(p.max_bid for p in pieces)
        raise InputError(f"{source}: bids up to {top_bid!r} give revenue or welfare per auction beyond the largest "
                         "double (~1.8e308); express the bids in a larger unit")
    out.loc[in_bid_units, cols] = scaled
    return out


def _strata_counts(pieces: Sequence[StratumPiece]) -> dict[int, int]:
    strata: dict[int, int] = {}
    for p in sorted(pieces, key=lambda p: p.n_bidders):
        strata[int(p.n_bidders)] = strata.get(int(p.n_bidders), 0) + int(p.n_auctions)
    return strata


def _warn(message: str) -> None:
    warnings.warn(message, EstimatorWarning, stacklevel=5)


def _place(pieces: Sequence[StratumPiece]) -> str:
    return ", ".join(p.key.describe() + f": {p.n_bids} bids" for p in pieces)


def _cr_factor(g: int) -> float:
    return g / (g - 1) if g >= 2 else np.nan


def _codes_of(p: StratumPiece) -> np.ndarray:
    """A piece's codes in its label space (``None`` stands for every code 0..B-1)."""
    return np.arange(p.bidder_ids.size) if p.bidder_codes is None else p.bidder_codes


def _bidder_totals(pieces: Sequence[StratumPiece], weights: np.ndarray) -> tuple[np.ndarray, float]:
    """``S_b = sum_s w_s S_{b,s}`` for every distinct bidder of the pieces (rows), per revenue label (columns).

    Returned as ``(sums, scale)`` with ``S = scale * sums``: one piece holding every bidder of its
    label space (``estimate_arms`` on one stratum) is used as it is, without a copy.
    """
    if len(pieces) == 1 and pieces[0].bidder_space is not None and pieces[0].bidder_codes is None:
        return pieces[0].bidder_sums, float(weights[0])  # every code of the space, in order
    space = pieces[0].bidder_space
    shared = space is not None and all(p.bidder_space is space for p in pieces)
    trim = shared  # codes may leave gaps: drop the codes no piece uses
    if shared:
        codes = [_codes_of(p) for p in pieces]  # one label space: no hashing of the ids
        n_codes = int(max(int(c.max()) + 1 if c.size else 0 for c in codes))
    else:
        ids = [p.bidder_ids for p in pieces]
        if all(i.dtype.kind in "iu" for i in ids):
            joined = np.concatenate(ids)
        else:
            joined = np.concatenate([ids_as_text(i) for i in ids])
        dense = _dense_labels(joined)
        if dense is not None:  # small non-negative integers (a day's dictionary codes): their own codes
            flat, n_codes, trim = dense, int(dense.max()) + 1, True
        else:
            flat, uniques = pd.factorize(joined, sort=False)
            n_codes = len(uniques)
        bounds = np.cumsum([0] + [i.size for i in ids])
        codes = [flat[lo:hi] for lo, hi in zip(bounds[:-1], bounds[1:])]
    n_columns = pieces[0].bidder_sums.shape[1]
    totals = np.zeros((n_columns, n_codes))
    for p, c, w in zip(pieces, codes, weights):
        every = shared and p.bidder_codes is None and c.size == n_codes  # every code of the space, in order
        for j in range(n_columns):
            if every:
                totals[j] += w * p.bidder_sums[:, j]
            else:
                totals[j] += np.bincount(c, weights=w * p.bidder_sums[:, j], minlength=n_codes)
    if trim:
        seen = np.zeros(n_codes, dtype=bool)
        for c in codes:
            seen[c] = True
        if not seen.all():  # codes of the shared space no piece here uses
            totals = totals[:, seen]
    return totals.T, 1.0


def _distinct_bidders(pieces: Sequence[StratumPiece]) -> int:
    space = pieces[0].bidder_space
    if space is not None and all(p.bidder_space is space for p in pieces):
        if any(p.bidder_codes is None for p in pieces):  # a piece with every code of the space
            return int(max(p.bidder_ids.size for p in pieces if p.bidder_codes is None))
        size = max(int(p.bidder_codes.max()) + 1 if p.bidder_codes.size else 0 for p in pieces)
        seen = np.zeros(size, dtype=bool)
        for p in pieces:
            seen[p.bidder_codes] = True
        return int(seen.sum())
    ids = [p.bidder_ids for p in pieces]
    joined = np.concatenate(ids) if all(i.dtype.kind in "iu" for i in ids) else np.concatenate([ids_as_text(i) for i in ids])
    dense = _dense_labels(joined)
    if dense is not None:
        return int(np.count_nonzero(np.bincount(dense)))
    return int(pd.unique(joined).size)


def _dense_labels(ids: np.ndarray) -> np.ndarray | None:
    """Integer ids as their own codes when they are non-negative and dense enough (at most ``4 n + 1024``
    for ``n`` ids, as a day's dictionary codes are): a bincount then replaces hashing. Else ``None``."""
    if ids.dtype.kind not in "iu" or not ids.size:
        return None
    lo, hi = int(ids.min()), int(ids.max())
    if lo < 0 or hi >= 4 * ids.size + 1024:
        return None
    return ids.astype(np.intp, copy=False)
