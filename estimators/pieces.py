"""One stratum's contribution to an estimate (:class:`StratumPiece`), keyed by :class:`StratumKey`.

Any split of auctions by something fixed before the auction -- the number of bidders ``n``, the
day, a stable hash shard of ``auction_id`` -- gives independent strata (auctions never span
strata). :func:`stratum_pieces` estimates every stratum (number of bidders) of one input alone
with the one kernel (:func:`~.stratum.estimate_stratum`) and returns one piece per stratum: a pure
function of that stratum's bids (numpy only), so it can run on any worker. The pieces are
combined by :func:`~.combine.combine_pieces` and stored by :mod:`.piece_frames`.

Bidder ids. Sums of one bidder from different strata, days or shards meet on the bidder id of the
log: ``int64`` when the log's ids are integers, text otherwise; two ids are the same bidder when
their text forms are equal (``7`` and ``'7'`` meet).

References
----------
.. [1] Serfling, R. (1980). Approximation Theorems of Mathematical Statistics, Wiley, sec. 8.2.
.. [2] Cameron, A. C. & Miller, D. L. (2015). A practitioner's guide to cluster-robust inference.
   J. Human Resources 50(2), 317-372.
"""

from __future__ import annotations

import dataclasses
import math
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ._ids import ids_as_text
from ._realized import auction_revenues, realized_cell
from ._validate import check_cluster, check_count, check_experiment_rule
from .allocation import allocation_rule, mixture_rule
from .bids import PreparedBids, prepare_bids, sorted_with_order
from .constants import MIN_STRATUM_BIDS, REVENUE, piece_labels
from .days import parse_day
from .errors import EstimatorWarning
from .spec import Experiment
from .order_weights import revenue_weights
from .scale_covariates import fit_scale
from .stratum import estimate_stratum, floor_step, stratum_weights, table_weights, unit_exponent
from .support import weights_bounded

__all__ = ["StratumKey", "StratumPiece", "pieces_of_prepared", "stratum_pieces"]


@dataclass(frozen=True, order=True)
class StratumKey:
    """What identifies a stratum among stored pieces: auctions in different keys never mix.

    Attributes
    ----------
    day : str or None
        ISO day of the bids, when the caller gave one.
    n_bidders : int
        Bids per auction.
    shard : int
        Shard of the stratum (:func:`~.sharding.shard_of`); 0 when the stratum is not split.
    segment : str or None
        The auctions' segment, when the experiment declares segments (``None``: not segmented).
    """

    day: str | None
    n_bidders: int
    shard: int = 0
    segment: str | None = None

    def describe(self) -> str:
        """The key as it reads in a message: ``'5 bidders shard 2 on 2026-03-02'``."""
        text = f"{self.n_bidders} bidders"
        if self.segment is not None:
            text += f" in segment {self.segment!r}"
        if self.shard:
            text += f" shard {self.shard}"
        if self.day is not None:
            text += f" on {self.day}"
        return text


@dataclass(frozen=True, eq=False)
class StratumPiece:
    """What one stratum (one number of bidders, one shard, one day) contributes to an estimate.

    Every number is in the piece's own bid unit, ``2**bid_exponent`` bids (``bid_exponent`` is 0
    unless the stratum's largest bid lies outside ``[2**-200, 2**200]``), so that no square
    overflows; :func:`~.combine.combine_pieces` brings pieces to a common unit exactly.

    Attributes
    ----------
    key : StratumKey
        Which stratum: day, number of bidders, shard, segment; ``n_bidders``,
        ``shard`` and ``day`` read through to it.
    n_auctions, n_bids : int
        Auctions (the combine weight ``M_s``) and bids of the stratum.
    labels : tuple of (arm, metric)
        The linear quantities, :func:`piece_labels`: revenue per arm, welfare per arm, mixture revenue.
    estimate : ndarray, shape (L,)
        The stratum's estimate of each label (per auction). NaN for a degenerate stratum, and for
        welfare where it is not identified; 0 for every label when no bid reaches the floor.
    covariance : ndarray, shape (L, L)
        Auction-clustered covariance of ``estimate`` without small-sample factor,
        ``sum_c S_c S_c'`` over the stratum's auctions with ``S_c`` the auction's summed influence
        divided by ``n_bids`` (Cameron & Miller's CR0); the usual clustered variance is
        ``G_s/(G_s-1)`` times this with ``G_s = n_auctions``. Welfare rows and columns are NaN
        (welfare has no interval).
    bidder_ids : ndarray or None
        The stratum's distinct bidders (the log's ids: int64 or str objects), when bidder
        clustering was asked for; else None.
    bidder_sums : ndarray or None, shape (len(bidder_ids), K + 1)
        Per bidder, the summed influence of its bids on the revenue labels (:attr:`sum_labels`:
        every arm's revenue, then the mixture's) divided by ``n_bids``: not scaled by the stratum's
        weight, so sums of one bidder add across strata once each is multiplied by ``M_s / M``.
        Welfare has no interval and no sums.
    arm_auctions : ndarray of int64, shape (K,)
        Auctions of each arm (the arm's bids are ``n_bidders`` times as many).
    realized_sum, realized_squares : ndarray, shape (K,)
        Per arm, the sum of the auctions' realized revenue and the sum of squared deviations of
        the auctions' realized revenue from the arm's mean in this stratum (0 without auctions).
    floor_quantile : float
        The floor's estimated quantile ``q*`` (share of sub-floor bids); NaN without a floor; 1
        when every bid lies below it (:attr:`below_floor`).
    max_bid : float
        The stratum's largest (effective) bid, in bid units.
    bid_exponent : int
        The piece's unit is ``2**bid_exponent`` bids.
    has_quality : bool
        Whether bids are effective bids (bid x quality).
    flags : tuple of str
        ``few_bids``, ``degenerate``, ``not_identified`` (welfare) of this stratum.
    own_variance : ndarray, shape (W,)
        Per what-if layout (the labels after the ``K`` arms), the CR0 auction-clustered variance of
        its revenue weights with itself as the mixture, on this stratum's bids (NaN where its
        weights against the mixture are unbounded): the numerator of the effective share
        (:func:`~.support.effective_share`). Empty without what-if layouts.
    """

    key: StratumKey
    n_auctions: int
    n_bids: int
    labels: tuple[tuple[str, str], ...]
    estimate: np.ndarray
    covariance: np.ndarray
    bidder_ids: np.ndarray | None
    bidder_sums: np.ndarray | None
    arm_auctions: np.ndarray
    realized_sum: np.ndarray
    realized_squares: np.ndarray
    floor_quantile: float
    max_bid: float
    bid_exponent: int
    has_quality: bool
    flags: tuple[str, ...]
    own_variance: np.ndarray = field(default_factory=lambda: np.empty(0))
    # In-process shortcut: bidder codes in a label space shared by the pieces of one call of
    # stratum_pieces, so combine_pieces needs no hashing of the ids (codes None with a space: the
    # piece holds every code of the space, in order). Not stored.
    bidder_codes: np.ndarray | None = field(default=None, repr=False, compare=False)
    bidder_space: object = field(default=None, repr=False, compare=False)

    @property
    def n_bidders(self) -> int:
        return self.key.n_bidders

    @property
    def shard(self) -> int:
        return self.key.shard

    @property
    def day(self) -> str | None:
        return self.key.day

    @property
    def below_floor(self) -> bool:
        """Whether no bid of the stratum reaches the floor (``q* = 1``): its estimates and sums are 0."""
        return self.floor_quantile == 1.0

    @property
    def sum_labels(self) -> tuple[tuple[str, str], ...]:
        """Labels of the columns of ``bidder_sums``: the revenue labels, in label order."""
        return tuple(label for label in self.labels if label[1] == REVENUE)

    @property
    def n_arms(self) -> int:
        """Arms that ran (``K``); the labels' targets after them are what-if layouts."""
        return int(self.arm_auctions.size)

    @property
    def n_targets(self) -> int:
        """Arms and what-if layouts (``T``)."""
        return (len(self.labels) - 1) // 2

    @property
    def arm_bids(self) -> np.ndarray:
        """Bids of each arm."""
        return self.arm_auctions * self.n_bidders

    def without_bidder_sums(self) -> StratumPiece:
        """The piece without its bidder sums (what is stored when the combination clusters by auction)."""
        return dataclasses.replace(self, bidder_ids=None, bidder_sums=None, bidder_codes=None, bidder_space=None)

    def equals(self, other: StratumPiece) -> bool:
        """Exact equality of every stored field (NaN equal to NaN; bidders matched by id text, in any order)."""
        if not isinstance(other, StratumPiece):
            return False
        for f in dataclasses.fields(self):
            if f.name in ("bidder_codes", "bidder_space"):
                continue
            a, b = getattr(self, f.name), getattr(other, f.name)
            if f.name in ("bidder_ids", "bidder_sums"):
                if (a is None) != (b is None):
                    return False
                if a is not None and f.name == "bidder_sums":  # bidders in any order, matched by id
                    mine, theirs = ids_as_text(self.bidder_ids), ids_as_text(other.bidder_ids)
                    if mine.size != theirs.size or not np.array_equal(np.sort(mine.astype(str)),
                                                                      np.sort(theirs.astype(str))):
                        return False
                    at = pd.Index(theirs).get_indexer(mine)
                    if not np.array_equal(a, b[at], equal_nan=True):
                        return False
            elif isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
                if (a is None) != (b is None) or (a is not None and not np.array_equal(a, b, equal_nan=True)):
                    return False
            elif isinstance(a, float) and isinstance(b, float):
                if not (a == b or (math.isnan(a) and math.isnan(b))):
                    return False
            elif a != b:
                return False
        return True


def stratum_pieces(bids, experiment: Experiment, *, shard: int = 0, day=None, cluster: str = "auto",
                   source: str = "bids", auction_covariance: bool = True) -> list[StratumPiece]:
    """Estimate every stratum (number of bidders, and segment when declared) of one input alone: one piece each.

    Parameters
    ----------
    bids : PreparedBids or pandas.DataFrame
        The input (one day, one shard, or any set of whole auctions); a frame is validated with
        :func:`~counterbid.estimators.prepare_bids` first.
    experiment : Experiment
    shard : int, optional
        Shard number recorded in every piece's key (the caller splits by
        :func:`~.sharding.shard_of`). Default 0.
    day : date, datetime or str, optional
        Day recorded in every piece's key (ISO text), so pieces of different days stay apart when stored.
    cluster : {'auto', 'auction', 'bidder'}, optional
        ``'bidder'`` keeps per-bidder influence sums in every piece (needed to combine with
        bidder clustering, also across days); ``'auction'`` does not; ``'auto'`` keeps them when
        some bidder id of the input appears in more than one auction (as ``estimate_arms``).
    source : str, optional
        Name of the input in error messages and warnings.
    auction_covariance : bool, optional
        Default True. False leaves a piece's revenue covariance NaN when it keeps bidder sums
        (as :func:`pieces_of_prepared`): only for pieces combined with bidder clustering and dropped.

    Returns
    -------
    list of StratumPiece
        Sorted by number of bidders, then segment label (``key.segment``; ``None`` unless the
        experiment declares ``segments``).

    Warns
    -----
    EstimatorWarning
        For a stratum whose bids (counted at the floor) are all equal (flag ``degenerate``).

    Notes
    -----
    Each piece is a function of its stratum's bids alone (the sort, the weights of its own
    ``n``, its floor quantile and unit), numpy only. See :func:`~.combine.combine_pieces` for the
    combination.

    References
    ----------
    .. [1] Serfling, R. (1980). Approximation Theorems of Mathematical Statistics, Wiley, sec. 8.2.
    """
    check_cluster(cluster)
    check_count("shard", shard, 0)
    check_experiment_rule(experiment)
    day_text = None if day is None else parse_day(day, what="day").isoformat()
    data = bids if isinstance(bids, PreparedBids) else prepare_bids(bids, experiment, source=source)
    return pieces_of_prepared(data, experiment, base=StratumKey(day=day_text, n_bidders=0, shard=int(shard)),
                              cluster=cluster, source=source, auction_covariance=auction_covariance)


def pieces_of_prepared(data: PreparedBids, experiment: Experiment, *, base: StratumKey, cluster: str, source: str,
                       auction_covariance: bool = True) -> list[StratumPiece]:
    """The pieces of validated bids, one per (number of bidders, segment), keyed like ``base`` (``n_bidders`` and
    ``segment`` replaced).

    ``auction_covariance=False`` (``estimate_arms``' shortcut: its pieces never leave the call)
    leaves ``covariance`` NaN when bidder sums are kept, saving a gather and a bincount per metric.
    """
    space = _bidder_space(data, cluster)
    stratum_of_auction, strata = _strata(data)
    numbers = []
    buffer = _Buffer()  # one influence buffer of the largest stratum's length, shared by every metric
    for n, seg, _ in strata:
        rows = _stratum_rows(data, n, seg) if len(strata) > 1 else None
        numbers.append(_stratum_numbers(data, rows, n, experiment, space, buffer, source=source,
                                        auction_covariance=auction_covariance))
    del buffer
    cells = _realized_cells(data, experiment, stratum_of_auction, len(strata), [x.exponent for x in numbers])
    labels = piece_labels(experiment)
    return [StratumPiece(
        key=dataclasses.replace(base, n_bidders=int(n), segment=None if seg < 0 else data.segment_names[seg]),
        n_auctions=int(a_n), n_bids=int(x.n_bids), labels=labels,
        estimate=x.estimate, covariance=x.covariance, bidder_ids=x.ids, bidder_sums=x.sums,
        arm_auctions=counts, realized_sum=sums, realized_squares=squares, floor_quantile=float(x.floor_quantile),
        max_bid=x.top_bid, bid_exponent=int(x.exponent), has_quality=bool(data.has_quality), flags=x.flags,
        own_variance=x.own_variance, bidder_codes=x.codes, bidder_space=space.token if x.ids is not None else None)
        for (n, seg, a_n), x, (sums, squares, counts) in zip(strata, numbers, cells)]


def _stratum_rows(data: PreparedBids, n: int, segment: int) -> np.ndarray:
    """The bids of the stratum of ``n`` bidders in segment code ``segment`` (-1: not segmented)."""
    mask = data.n_bidders == n
    if segment >= 0:
        mask &= data.segment == segment
    return np.flatnonzero(mask)


@dataclass(frozen=True)
class _BidderSpace:
    """Bidder clusters of one input: a code 0..B-1 per bid, the log's id of each code, and a token
    that marks pieces sharing this code space."""

    codes: np.ndarray
    ids: np.ndarray
    token: object = field(default_factory=object)


def _bidder_space(data: PreparedBids, cluster: str) -> _BidderSpace | None:
    """The input's bidder clusters when bidder sums are to be kept (``bidder``, or ``auto`` with repeats)."""
    if cluster == "auction":
        return None
    codes, label_of_code = _bidder_clusters(data.bidder)
    if not (cluster == "bidder" or label_of_code.size < data.bidder.size):
        return None
    if data.bidder_ids is None:
        ids = label_of_code.astype(np.int64, copy=False)
    elif label_of_code.size == data.bidder_ids.size:  # every label present (sorted): no gather
        ids = data.bidder_ids
    else:
        ids = data.bidder_ids[label_of_code]
    return _BidderSpace(codes, ids)


def _bidder_clusters(bidder: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Codes 0..B-1 of the bidder labels and the label of each code (B distinct bidders)."""
    n = bidder.size
    if bidder.dtype.kind in "iu" and n:
        lo, hi = int(bidder.min()), int(bidder.max())
        if lo >= 0 and hi < 4 * n + 1024:
            present = np.bincount(bidder, minlength=hi + 1) > 0
            labels = np.flatnonzero(present)
            if labels.size == n:  # nobody bids twice: a bid is its own cluster
                return np.arange(bidder.size, dtype=np.intp), bidder
            rank = np.cumsum(present, dtype=np.int64 if labels.size >= 2**31 else np.int32) - 1
            return rank[bidder], labels
    codes, uniques = pd.factorize(bidder, sort=False)
    return codes, np.asarray(uniques)


def _strata(data: PreparedBids) -> tuple[np.ndarray, list[tuple[int, int, int]]]:
    """The stratum index of every auction, and (n, segment code, auctions) of each stratum, by n then segment.

    The segment code is -1 when the experiment declares no segments.
    """
    n_of_auction = np.zeros(data.n_auctions, dtype=np.int64)
    n_of_auction[data.auction] = data.n_bidders
    if data.segment is None:
        key = n_of_auction
        n_segments = 1
    else:
        n_segments = max(len(data.segment_names), 1)
        segment_of_auction = np.zeros(data.n_auctions, dtype=np.int64)
        segment_of_auction[data.auction] = data.segment
        key = n_of_auction * n_segments + segment_of_auction
    values, stratum_of_auction, counts = np.unique(key, return_inverse=True, return_counts=True)
    strata = [(int(v) // n_segments, -1 if data.segment is None else int(v) % n_segments, int(c))
              for v, c in zip(values.tolist(), counts.tolist())]
    return stratum_of_auction, strata


class _Buffer:
    """A float buffer grown to the largest stratum, reused by every stratum and metric."""

    def __init__(self) -> None:
        self.array: np.ndarray | None = None

    def of(self, size: int) -> np.ndarray:
        if self.array is None or self.array.size < size:
            self.array = np.empty(size)
        return self.array[:size]


@dataclass
class _Numbers:
    """What one stratum's bids give, before the realized cells are added."""

    n_bids: int
    estimate: np.ndarray
    covariance: np.ndarray
    ids: np.ndarray | None
    sums: np.ndarray | None
    codes: np.ndarray | None
    floor_quantile: float
    top_bid: float
    exponent: int
    flags: tuple[str, ...]
    own_variance: np.ndarray = field(default_factory=lambda: np.empty(0))


def _stratum_numbers(data: PreparedBids, rows: np.ndarray | None, n: int, experiment: Experiment,
                     space: _BidderSpace | None, buffer: _Buffer, *, source: str,
                     auction_covariance: bool) -> _Numbers:
    """Sort one stratum's bids once, apply every arm's weights (the kernel), and keep its sums.

    ``rows``: the stratum's bids in the input (``None``: all of them).
    """
    k_arms, k_targets = len(experiment.arms), len(experiment.targets)
    n_labels = 2 * k_targets + 1
    b_raw = data.bid if rows is None else data.bid[rows]
    top_bid = float(b_raw.max())
    scale = None
    if data.covariates is not None:  # estimate on homogenised bids, scale back below (docs/method.md)
        scale = fit_scale(b_raw, data.covariates if rows is None else data.covariates[rows], source=source)
        b_raw = scale.homogenized
    exponent = unit_exponent(float(b_raw.max()))
    floor_value = math.ldexp(float(experiment.floor or 0.0), -exponent)  # per click, (effective) bid units
    if exponent:
        b_raw = np.ldexp(b_raw, -exponent)
    order, sorted_bids = sorted_with_order(b_raw)  # the one sort shared by every arm and metric
    big_n = sorted_bids.size
    flags = ["few_bids"] if big_n < MIN_STRATUM_BIDS else []
    floor = floor_step(sorted_bids, floor_value)
    estimate = np.full(n_labels, np.nan)
    covariance = np.full((n_labels, n_labels), np.nan)
    ids = sums = codes = None
    if space is not None:
        if rows is None:  # the whole input is this stratum: every code is present
            ids = space.ids
        else:
            present = np.flatnonzero(np.bincount(space.codes[rows], minlength=space.ids.size))
            ids, codes = space.ids[present], present
    numbers = _Numbers(big_n, estimate, covariance, ids, None, codes, floor.quantile, top_bid, exponent, (),
                       np.full(k_targets - k_arms, np.nan))
    if floor_value > 0 and floor.n_below == big_n:  # no eligible bid: revenue and welfare 0, influence 0
        return _below_floor_numbers(numbers, k_targets, tuple(flags))
    if sorted_bids[0] == sorted_bids[-1]:
        flags.append("degenerate")
        _warn_degenerate(sorted_bids, n, exponent, floor_value, floor.floor is None, source)
        numbers.sums = None if ids is None else np.full((ids.size, k_targets + 1), np.nan)
        numbers.flags = tuple(flags)
        return numbers
    auc = None
    if auction_covariance or space is None or k_targets > k_arms:  # what-ifs' effective share: auction sums
        auc = (data.auction if rows is None else data.auction[rows])[order].astype(np.intp, copy=False)
    bcs = None
    if space is not None:
        bcs = (space.codes if rows is None else space.codes[rows])[order].astype(np.intp, copy=False)
    del order, b_raw
    if scale is not None:  # the scaling's influence per unit of estimate: auction and bidder sums, like the kernel's
        unit = scale.unit_influence / big_n
        auc_rows = data.auction if rows is None else data.auction[rows]
        scale_sums = (None if auc is None else np.bincount(auc_rows, weights=unit, minlength=data.n_auctions),
                      None if bcs is None else _unit_bidder_sums(space, rows, codes, unit))
    if ids is not None:  # allocated after the sort's temporaries are gone
        sums = np.empty((ids.size, k_targets + 1))
    extra = k_targets - k_arms  # what-if layouts: one more revenue pass each, with themselves as the mixture
    auction_sums = None if auc is None else np.empty((k_targets + extra, data.n_auctions))

    def keep(k: int, influence: np.ndarray) -> None:
        if auction_sums is not None:
            auction_sums[k] = np.bincount(auc, weights=influence, minlength=data.n_auctions)
        if bcs is not None and k < k_targets:
            by_code = np.bincount(bcs, weights=influence, minlength=space.ids.size)
            sums[:, k] = by_code if codes is None else by_code[codes]

    shares = np.array(experiment.shares)
    revenue, welfare, bounded = _target_weights(experiment, n, big_n, floor)
    if any(w is None for w in welfare):
        flags.append("not_identified")
    out = estimate_stratum(sorted_bids, n, revenue, welfare, floor, influence=buffer.of(big_n), on_influence=keep)
    if scale is not None:
        _scale_back(scale.scale_mean, out, k_targets + extra, auction_sums, sums, *scale_sums)
    estimate[:k_targets] = out[:k_targets]
    estimate[k_targets:2 * k_targets] = out[k_targets + extra:]
    # The estimator is linear in the target rule and the mixture's rule is the share-weighted sum of
    # the arms' rules, so the mixture's revenue (and its influence) is the shares' sum.
    estimate[-1] = float(shares @ estimate[:k_arms])
    if auction_sums is not None:
        _auction_covariance(covariance, auction_sums[:k_targets], shares)
        own = auction_sums[k_targets:]
        numbers.own_variance = np.einsum("ij,ij->i", own, own)
    if sums is not None:
        sums[:, k_targets] = np.einsum("ij,j->i", sums[:, :k_arms], shares)  # not BLAS: no threads to wake
    for j in np.flatnonzero(~bounded):  # unbounded weights: no number for this layout
        t = k_arms + j
        estimate[[t, k_targets + t]] = np.nan
        covariance[t, :] = covariance[:, t] = np.nan
        numbers.own_variance[j] = np.nan
        if sums is not None:
            sums[:, t] = np.nan
    numbers.sums, numbers.flags = sums, tuple(flags)
    return numbers


def _below_floor_numbers(numbers: _Numbers, k_targets: int, flags: tuple[str, ...]) -> _Numbers:
    """A stratum whose every bid lies below the floor: ``q* = 1``, every label 0, every influence 0.

    With ``q* = N/N`` the weighted sum of the clamped bids (all ``r``) is ``n r Omega(1)`` and the
    floor's term ``-n r Omega(1)`` cancels it (:func:`~.payment_rules.floor_terms`; Myerson's
    ``r (1 - q*) y(q*)`` and the integral over ``q > q*`` vanish); each bid's influence is the
    L-statistic's, 0 on equal bids, plus ``floor_slope (1{b < r} - q*) = 0`` (docs/method.md, "A
    stratum with no bid at the floor"). The kernel gives the same to rounding (tested); here the
    zeros are exact and no weights are built.
    """
    numbers.estimate[:] = 0.0
    revenue = list(range(k_targets)) + [numbers.estimate.size - 1]
    numbers.covariance[np.ix_(revenue, revenue)] = 0.0  # welfare rows stay NaN: no interval
    numbers.own_variance[:] = 0.0
    numbers.floor_quantile = 1.0
    numbers.sums = None if numbers.ids is None else np.zeros((numbers.ids.size, k_targets + 1))
    numbers.flags = flags
    return numbers


def _unit_bidder_sums(space: _BidderSpace, rows: np.ndarray | None, codes: np.ndarray | None,
                      unit: np.ndarray) -> np.ndarray:
    """Per bidder of the stratum (the order of its ``sums``), the summed scaling influence ``unit``."""
    by_code = np.bincount(space.codes if rows is None else space.codes[rows], weights=unit, minlength=space.ids.size)
    return by_code if codes is None else by_code[codes]


def _scale_back(m: float, out: np.ndarray, n_revenue: int, auction_sums: np.ndarray | None,
                sums: np.ndarray | None, unit_auction: np.ndarray | None, unit_bidder: np.ndarray | None) -> None:
    """Estimates on homogenised bids back to the bids' scale, in place (:func:`.scale_covariates.fit_scale`).

    Each label's estimate ``T~`` becomes ``m T~``; each revenue label's influence sums ``S~``
    become ``m S~ + T~ U`` with ``U`` the sums of the scaling's unit influence.
    """
    if auction_sums is not None:
        auction_sums *= m
        auction_sums += out[:n_revenue, None] * unit_auction[None, :]
    if sums is not None:
        k = sums.shape[1] - 1  # revenue per target (the mixture's column is filled afterwards)
        sums[:, :k] *= m
        sums[:, :k] += unit_bidder[:, None] * out[None, :k]
    out *= m


def _target_weights(experiment: Experiment, n: int, big_n: int, floor) -> tuple[list, list, np.ndarray]:
    """Revenue weights of every target (arms, what-ifs) and of each what-if against itself; welfare weights.

    A what-if layout whose weights against the mixture are unbounded (:func:`~.support.weights_bounded`)
    is estimated with the mixture's weights as a stand-in and marked ``False`` in the returned mask
    (its numbers are set to NaN by the caller).
    """
    arm_rules = [allocation_rule(a.weights_for(n), n) for a in experiment.arms]
    mixture = mixture_rule(arm_rules, np.array(experiment.shares))
    what_if = [allocation_rule(w.weights_for(n), n) for w in experiment.what_if]
    bounded = np.array([weights_bounded(y, mixture, experiment.payment_rule) for y in what_if], dtype=bool)
    targets = arm_rules + [y if ok else mixture for y, ok in zip(what_if, bounded)]
    options = {"payment_rule": experiment.payment_rule, "floor": floor.floor}
    revenue, welfare = stratum_weights(targets, mixture, big_n, **options)
    own = [revenue_weights(y if ok else mixture, y if ok else mixture, big_n, **options)
           for y, ok in zip(what_if, bounded)]
    rev, wel = table_weights(revenue + own, welfare, n, big_n)
    return rev, wel, bounded


def _auction_covariance(covariance: np.ndarray, auction_sums: np.ndarray, shares: np.ndarray) -> None:
    """Fill the revenue block of ``covariance`` (targets, then the mixture) with the CR0 sum of auction sums."""
    k_targets, k_arms = auction_sums.shape[0], shares.size
    block = auction_sums @ auction_sums.T  # targets x targets, CR0
    mix_row = shares @ block[:k_arms]
    covariance[np.ix_(range(k_targets), range(k_targets))] = block
    covariance[-1, :k_targets] = covariance[:k_targets, -1] = mix_row
    covariance[-1, -1] = float(mix_row[:k_arms] @ shares)


def _warn_degenerate(sorted_bids: np.ndarray, n: int, exponent: int, floor_value: float, no_floor: bool,
                     source: str) -> None:
    what = "bids equal" if no_floor and floor_value == 0 else "bids, counted at the floor, equal"
    warnings.warn(f"{source}: stratum of {n} bidders: all {sorted_bids.size} {what} "
                  f"{float(np.ldexp(sorted_bids[0], exponent))!r}; equal bids are no equilibrium of continuous "
                  "values, so revenue, welfare and lift are NaN (status 'degenerate')", EstimatorWarning,
                  stacklevel=5)


def _realized_cells(data: PreparedBids, experiment: Experiment, stratum_of_auction: np.ndarray, n_strata: int,
                    exponents: list[int]) -> list[tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """Realized per-arm sums of each stratum (:func:`._realized.realized_cell`), in each stratum's unit.

    Every auction's realized revenue depends on its own bids only; it is computed once in the unit
    of the largest bid (a power of two: exact) and brought to each stratum's unit.
    """
    k_arms = len(experiment.arms)
    floor_bid = float(experiment.floor or 0.0)
    arm_of_auction = np.zeros(data.n_auctions, dtype=np.int64)
    arm_of_auction[data.auction] = data.arm
    top_exponent = unit_exponent(float(data.bid.max()))
    if top_exponent:
        scaled = dataclasses.replace(data, bid=np.ldexp(data.bid, -top_exponent))
        revenue = auction_revenues(scaled, experiment, floor=math.ldexp(floor_bid, -top_exponent))
        del scaled
    else:
        revenue = auction_revenues(data, experiment, floor=floor_bid)
    cells = []
    for s, exponent in enumerate(exponents):
        mask = stratum_of_auction == s if n_strata > 1 else None
        rev = revenue if mask is None else revenue[mask]
        arm_k = arm_of_auction if mask is None else arm_of_auction[mask]
        rev = np.ldexp(rev, top_exponent - exponent) if exponent != top_exponent else rev
        cells.append(realized_cell(rev, arm_k, k_arms))
    return cells
