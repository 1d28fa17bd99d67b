"""Strata as the unit of work: estimate each stratum alone, keep what it contributes, combine by auction counts.

Any split of auctions by something fixed before the auction -- the number of bidders ``n``, the
day, a stable hash shard of ``auction_id`` -- gives independent strata (auctions never span
strata). :func:`stratum_pieces` estimates every stratum (number of bidders) of one input alone and
returns one :class:`StratumPiece` per stratum: a pure function of that stratum's bids (numpy
only), so it can run on any worker. :func:`combine_pieces` turns any set of pieces -- the strata of
one day, the shards of one stratum, the stored pieces of every day of an experiment -- into the
frame :func:`~counterbid.estimators.estimate_arms` returns (which is
``combine_pieces(stratum_pieces(prepare_bids(...)))``). With ``M_s`` the auctions of stratum ``s``
and ``M = sum_s M_s``:

* estimates: ``T = sum_s (M_s / M) T_s`` for every linear quantity (revenue and welfare per arm,
  the mixture's revenue);
* auction clustering: ``Var T = G/(G-1) sum_s (M_s / M)^2 C_s`` with ``C_s`` the stratum's
  covariance without small-sample factor and ``G = M`` auctions;
* bidder clustering: each bidder's influence sums are added across strata first,
  ``S_b = sum_s (M_s / M) S_{b,s}``, then ``Var T = G/(G-1) sum_b S_b S_b'`` with ``G`` the
  distinct bidders of all pieces;
* lifts (a ratio of revenues) by the delta method from the combined estimates and their
  combined covariance (or the combined bidder sums);
* the realized per-arm average from per-stratum sufficient sums (auctions, revenue sum, squared
  deviations about the stratum's arm mean), combined exactly (Chan, Golub & LeVeque 1983).

Bidder ids. Sums of one bidder from different strata, days or shards meet on the bidder id of the
log: ``int64`` when the log's ids are integers, text otherwise; two ids are the same bidder when
their text forms are equal (``7`` and ``'7'`` meet). Stored pieces keep the id as text
(:func:`pieces_to_frames`).

Shards. :func:`shard_of` is the stable shard of an auction id,
``int(md5(str(auction_id)).hexdigest()[:8], 16) % n_shards`` -- the same number DuckDB computes
as ``md5(cast(auction_id as varchar))``; :func:`n_shards` splits a stratum of ``N`` bids into
``ceil(N / max_bids_per_shard)`` shards. Each shard's estimate has a bias of order ``1 / N_s``
(the estimator's own small-sample bias), so the combination of ``k`` shards carries about ``k``
times the bias of the unsharded estimate: negligible against its standard error at ``N_s >= 1e4``
bids (``tests/estimators/test_pieces.py``; ``docs/method.md``, "Strata, shards and the experiment
to date").

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
import hashlib
import math
import warnings
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import stats

from ._floor import add_floor_influence, clamp_at_floor
from ._realized import auction_revenues, combine_realized, realized_cell
from .allocation import AllocationRule, allocation_rule, mixture_rule
from .errors import EstimatorWarning, InputError
from .order_weights import WeightTable, revenue_weights, welfare_weights
from .payment_rules import PAYMENT_RULES
from .spec import Experiment, parse_day

__all__ = [
    "MAX_BIDS_PER_SHARD",
    "PIECE_FRAMES",
    "REVENUE",
    "WELFARE",
    "StratumPiece",
    "combine_pieces",
    "n_shards",
    "piece_labels",
    "pieces_from_frames",
    "pieces_to_frames",
    "shard_of",
    "stratum_pieces",
]

#: Default largest stratum, in bids, estimated in one piece; a larger stratum is split into
#: ``n_shards(bids, MAX_BIDS_PER_SHARD)`` shards by :func:`shard_of` of its auction ids.
MAX_BIDS_PER_SHARD = 4_000_000
#: Metric names of the labels (the same as the result rows').
REVENUE = "revenue_per_auction"
WELFARE = "welfare_per_auction"
#: Names of the frames :func:`pieces_to_frames` returns.
PIECE_FRAMES = ("strata", "arms", "covariance", "bidder_sums")
_KEY = ["day", "n_bidders", "shard"]


def piece_labels(experiment: Experiment) -> tuple[tuple[str, str], ...]:
    """The (arm, metric) labels of a piece's linear quantities, in order.

    Revenue of every arm, welfare of every arm, then the mixture's revenue (arm ``_mixture``).
    """
    from .arms import MIXTURE_ARM

    names = experiment.arm_names
    return tuple([(a, REVENUE) for a in names] + [(a, WELFARE) for a in names] + [(MIXTURE_ARM, REVENUE)])


@dataclass(frozen=True, eq=False)
class StratumPiece:
    """What one stratum (one number of bidders, one shard, one day) contributes to an estimate.

    Every number is in the piece's own bid unit, ``2**bid_exponent`` bids (``bid_exponent`` is 0
    unless the stratum's largest bid lies outside ``[2**-200, 2**200]``), so that no square
    overflows; :func:`combine_pieces` brings pieces to a common unit exactly.

    Attributes
    ----------
    n_bidders : int
        Bids per auction in this stratum.
    shard : int
        Shard of the stratum (:func:`shard_of`); 0 when the stratum is not split.
    day : str or None
        ISO day of the bids, when the caller gave one.
    n_auctions, n_bids : int
        Auctions (the combine weight ``M_s``) and bids of the stratum.
    labels : tuple of (arm, metric)
        The linear quantities, :func:`piece_labels`: revenue per arm, welfare per arm, mixture revenue.
    estimate : ndarray, shape (L,)
        The stratum's estimate of each label (per auction). NaN for a degenerate stratum, and for
        welfare where it is not identified.
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
        The floor's estimated quantile ``q*`` (share of sub-floor bids); NaN without a floor or
        when every bid lies below it.
    max_bid : float
        The stratum's largest (effective) bid, in bid units.
    bid_exponent : int
        The piece's unit is ``2**bid_exponent`` bids.
    has_quality : bool
        Whether bids are effective bids (bid x quality).
    flags : tuple of str
        ``few_bids``, ``degenerate``, ``not_identified`` (welfare) of this stratum.
    """

    n_bidders: int
    shard: int
    day: str | None
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
    # In-process shortcut: bidder codes in a label space shared by the pieces of one call of
    # stratum_pieces, so combine_pieces needs no hashing of the ids (codes None with a space: the
    # piece holds every code of the space, in order). Not stored.
    _bidder_codes: np.ndarray | None = field(default=None, repr=False, compare=False)
    _bidder_space: object = field(default=None, repr=False, compare=False)

    @property
    def key(self) -> tuple[str | None, int, int]:
        """``(day, n_bidders, shard)``: what identifies the piece among stored pieces."""
        return (self.day, self.n_bidders, self.shard)

    @property
    def sum_labels(self) -> tuple[tuple[str, str], ...]:
        """Labels of the columns of ``bidder_sums``: the revenue labels, in label order."""
        return tuple(label for label in self.labels if label[1] == REVENUE)

    @property
    def arm_bids(self) -> np.ndarray:
        """Bids of each arm."""
        return self.arm_auctions * self.n_bidders

    def equals(self, other: StratumPiece) -> bool:
        """Exact equality of every stored field (NaN equal to NaN; bidders matched by id text, in any order)."""
        if not isinstance(other, StratumPiece):
            return False
        for f in dataclasses.fields(self):
            if f.name.startswith("_"):
                continue
            a, b = getattr(self, f.name), getattr(other, f.name)
            if f.name in ("bidder_ids", "bidder_sums"):
                if (a is None) != (b is None):
                    return False
                if a is not None and f.name == "bidder_sums":  # bidders in any order, matched by id
                    mine, theirs = _as_text(self.bidder_ids), _as_text(other.bidder_ids)
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

    def to_frames(self) -> dict[str, pd.DataFrame]:
        """This piece as the plain frames of :func:`pieces_to_frames`."""
        return pieces_to_frames([self])

    @classmethod
    def from_frames(cls, frames: dict[str, pd.DataFrame]) -> StratumPiece:
        """The one piece the frames hold (:func:`pieces_from_frames`)."""
        pieces = pieces_from_frames(frames)
        if len(pieces) != 1:
            raise InputError(f"piece frames: expected one piece, found {len(pieces)}")
        return pieces[0]


# -- shards -------------------------------------------------------------------------------------
def shard_of(auction_ids, n_shards: int) -> np.ndarray:
    """The stable shard of each auction id: ``int(md5(str(id)).hexdigest()[:8], 16) % n_shards``.

    The reference implementation (hashlib; each distinct id hashed once) of the rule DuckDB
    computes as ``('0x' || left(md5(cast(auction_id as varchar)), 8))::ubigint % n_shards`` and a
    Spark engine as ``conv(substr(md5(cast(auction_id as string)), 1, 8), 16, 10) % n_shards``:
    the same on every engine and every rerun. Integer ids hash their decimal text (``42`` ->
    ``'42'``), text ids their UTF-8 bytes.

    Parameters
    ----------
    auction_ids : array-like
        Integer or text auction ids (a pandas Series, numpy array or list).
    n_shards : int
        At least 1.

    Returns
    -------
    ndarray of int64
        Shard ``0 .. n_shards - 1`` of each id.

    References
    ----------
    .. [1] Rivest, R. (1992). The MD5 message-digest algorithm. RFC 1321.
    """
    if isinstance(n_shards, bool) or not isinstance(n_shards, (int, np.integer)) or n_shards < 1:
        raise InputError(f"`n_shards` must be an integer >= 1; got {n_shards!r}")
    codes, uniques = pd.factorize(pd.Series(auction_ids) if not isinstance(auction_ids, pd.Series) else auction_ids,
                                  sort=False)
    if (codes < 0).any():
        raise InputError(f"auction_id row {int(np.flatnonzero(codes < 0)[0])} is null; every auction needs an id")
    texts = _as_text(_id_values(uniques))
    heads = np.fromiter((int.from_bytes(hashlib.md5(t.encode("utf-8")).digest()[:4], "big") for t in texts),
                        dtype=np.int64, count=len(texts))
    return (heads % int(n_shards))[codes]


def n_shards(n_bids: int, max_bids_per_shard: int = MAX_BIDS_PER_SHARD) -> int:
    """Shards of a stratum of ``n_bids`` bids: ``ceil(n_bids / max_bids_per_shard)`` (at least 1)."""
    for name, v in (("n_bids", n_bids), ("max_bids_per_shard", max_bids_per_shard)):
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < (0 if name == "n_bids" else 1):
            raise InputError(f"`{name}` must be an integer >= {0 if name == 'n_bids' else 1}; got {v!r}")
    return max(1, -(-int(n_bids) // int(max_bids_per_shard)))


def _id_values(values) -> np.ndarray:
    """Ids as int64 (integers) or objects."""
    values = pd.Index(values)
    if pd.api.types.is_integer_dtype(values.dtype) or pd.api.types.infer_dtype(values, skipna=False) == "integer":
        return values.to_numpy(dtype=np.int64)
    return values.to_numpy(dtype=object)


def _as_text(ids: np.ndarray) -> np.ndarray:
    """Ids as str objects (integers by their decimal text)."""
    if ids.dtype == object and all(type(v) is str for v in ids[:64]) and pd.api.types.infer_dtype(ids) == "string":
        return ids
    return np.array([str(int(v)) if isinstance(v, (int, np.integer)) else str(v) for v in ids.tolist()], dtype=object)


# -- one stratum --------------------------------------------------------------------------------
def _unit_exponent(top_bid: float) -> int:
    """The piece's unit: 0, or frexp's exponent of the largest bid when it lies outside [2**-200, 2**200]."""
    from .arms import _UNIT_EXPONENT

    if top_bid > 0 and not 2.0**-_UNIT_EXPONENT <= top_bid <= 2.0**_UNIT_EXPONENT:
        return math.frexp(top_bid)[1]
    return 0


def _bidder_clusters(bidder: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Codes 0..B-1 of the bidder labels and the label of each code (B distinct bidders)."""
    n = bidder.size
    if bidder.dtype.kind in "iu" and n:
        lo, hi = int(bidder.min()), int(bidder.max())
        if lo >= 0 and hi < 4 * n + 1024:
            present = np.bincount(bidder, minlength=hi + 1) > 0
            labels = np.flatnonzero(present)
            if labels.size == n:  # nobody bids twice: a bid is its own cluster
                return _all_distinct(bidder)
            rank = np.cumsum(present, dtype=np.int64 if labels.size >= 2**31 else np.int32) - 1
            return rank[bidder], labels
    codes, uniques = pd.factorize(bidder, sort=False)
    return codes, np.asarray(uniques)


def _all_distinct(bidder: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    return np.arange(bidder.size, dtype=np.intp), bidder


def stratum_pieces(bids, experiment: Experiment, *, shard: int = 0, day=None, cluster: str = "auto",
                   source: str = "bids") -> list[StratumPiece]:
    """Estimate every stratum (number of bidders) of one input alone: one :class:`StratumPiece` each.

    Parameters
    ----------
    bids : PreparedBids or pandas.DataFrame
        The input (one day, one shard, or any set of whole auctions); a frame is validated with
        :func:`~counterbid.estimators.prepare_bids` first.
    experiment : Experiment
    shard : int, optional
        Shard number recorded in every piece (the caller splits by :func:`shard_of`). Default 0.
    day : date, datetime or str, optional
        Day recorded in every piece (ISO text), so pieces of different days stay apart when stored.
    cluster : {'auto', 'auction', 'bidder'}, optional
        ``'bidder'`` keeps per-bidder influence sums in every piece (needed to combine with
        bidder clustering, also across days); ``'auction'`` does not; ``'auto'`` keeps them when
        some bidder id of the input appears in more than one auction (as ``estimate_arms``).
    source : str, optional
        Name of the input in error messages and warnings.

    Returns
    -------
    list of StratumPiece
        Sorted by number of bidders.

    Warns
    -----
    EstimatorWarning
        For a stratum whose bids (counted at the floor) are all equal (flag ``degenerate``).

    Notes
    -----
    Each piece is a function of its stratum's bids alone (the sort, the weights of its own
    ``n``, its floor quantile and unit), numpy only. See :func:`combine_pieces` for the combination.

    References
    ----------
    .. [1] Serfling, R. (1980). Approximation Theorems of Mathematical Statistics, Wiley, sec. 8.2.
    """
    from .arms import CLUSTERS, PreparedBids, prepare_bids

    if cluster not in CLUSTERS:
        raise InputError(f"`cluster` must be one of {', '.join(CLUSTERS)}; got {cluster!r}")
    if isinstance(shard, bool) or not isinstance(shard, (int, np.integer)) or shard < 0:
        raise InputError(f"`shard` must be an integer >= 0; got {shard!r}")
    if experiment.payment_rule not in PAYMENT_RULES:
        raise InputError(f"experiment {experiment.id!r}: unknown payment_rule {experiment.payment_rule!r} "
                         f"(supported: {', '.join(PAYMENT_RULES)})")
    day_text = None if day is None else parse_day(day, what="day").isoformat()
    data = bids if isinstance(bids, PreparedBids) else prepare_bids(bids, experiment, source=source)
    return _stratum_pieces(data, experiment, shard=int(shard), day=day_text, cluster=cluster, source=source)


def _stratum_pieces(data, experiment: Experiment, *, shard: int, day: str | None, cluster: str,
                    source: str, skip_auction_covariance: bool = False) -> list[StratumPiece]:
    """The pieces; ``skip_auction_covariance`` (estimate_arms' shortcut, pieces never leave the call):
    when bidder sums are kept, leave ``covariance`` NaN, saving a gather and a bincount per metric."""
    from .arms import MIN_STRATUM_BIDS, _endpoint_gaps, _l_statistic, sorted_with_order

    arms = experiment.arms
    k_arms = len(arms)
    labels = piece_labels(experiment)
    n_labels = len(labels)
    shares = np.array(experiment.shares)

    # Bidder clusters (when asked): codes 0..B-1 shared by the strata of this input, and each code's id.
    bidder_codes = bidder_ids_of_code = None
    if cluster != "auction":
        codes, label_of_code = _bidder_clusters(data.bidder)
        repeats = label_of_code.size < data.bidder.size
        if cluster == "bidder" or repeats:
            bidder_codes = codes
            if data.bidder_ids is None:
                bidder_ids_of_code = label_of_code.astype(np.int64, copy=False)
            elif label_of_code.size == data.bidder_ids.size:  # every label present (sorted): no gather
                bidder_ids_of_code = data.bidder_ids
            else:
                bidder_ids_of_code = data.bidder_ids[label_of_code]
        del codes, label_of_code
    space = object() if bidder_codes is not None else None
    n_codes = 0 if bidder_ids_of_code is None else bidder_ids_of_code.size

    # Auctions per stratum, and the realized revenue of every auction (it depends on the auction's own bids only).
    n_of_auction = np.zeros(data.n_auctions, dtype=np.int64)
    n_of_auction[data.auction] = data.n_bidders
    strata, strata_auctions = np.unique(n_of_auction, return_counts=True)
    rule = experiment.payment_rule
    floor_bid = float(experiment.floor or 0.0)  # per click, (effective) bid units

    pieces = []
    influence = None  # one buffer of the largest stratum's length, shared by every metric
    for n, a_n in zip(strata.tolist(), strata_auctions.tolist()):
        sel = np.flatnonzero(data.n_bidders == n) if strata.size > 1 else None
        b_raw = data.bid if sel is None else data.bid[sel]
        top_bid = float(b_raw.max())
        exponent = _unit_exponent(top_bid)
        floor_value = math.ldexp(floor_bid, -exponent)
        if exponent:
            b_raw = np.ldexp(b_raw, -exponent)
        order, sorted_bids = sorted_with_order(b_raw)  # the one sort shared by every arm and metric
        big_n = sorted_bids.size
        flags = ["few_bids"] if big_n < MIN_STRATUM_BIDS else []
        floor = None
        n_below = 0
        floor_quantile = np.nan
        if floor_value > 0:
            # q* is the share of sub-floor bids (strict: a bid equal to the floor is eligible);
            # sub-floor bids then count as the floor (the order is kept).
            floor, n_below = clamp_at_floor(sorted_bids, floor_value)
            if floor is not None:
                floor_quantile = floor.quantile
        estimate = np.full(n_labels, np.nan)
        covariance = np.full((n_labels, n_labels), np.nan)
        piece_ids = piece_sums = piece_codes = None
        if bidder_codes is not None:
            if sel is None:  # the whole input is this stratum: every code is present
                piece_ids = bidder_ids_of_code  # codes: all of them (None)
            else:
                present = np.flatnonzero(np.bincount(bidder_codes[sel], minlength=n_codes))
                piece_ids, piece_codes = bidder_ids_of_code[present], present
        if sorted_bids[0] == sorted_bids[-1]:
            flags.append("degenerate")
            what = "bids equal" if floor is None and floor_value == 0 else "bids, counted at the floor, equal"
            warnings.warn(f"{source}: stratum of {n} bidders: all {big_n} {what} "
                          f"{float(np.ldexp(sorted_bids[0], exponent))!r}; equal bids are no equilibrium of continuous "
                          "values, so revenue, welfare and lift are NaN (status 'degenerate')", EstimatorWarning,
                          stacklevel=4)
            del order, sorted_bids, b_raw
            if piece_ids is not None:
                piece_sums = np.full((piece_ids.size, k_arms + 1), np.nan)
        else:
            auc = None
            if not (skip_auction_covariance and bidder_codes is not None):
                auc = (data.auction if sel is None else data.auction[sel])[order].astype(np.intp, copy=False)
            bcs = None
            if bidder_codes is not None:
                bcs = (bidder_codes if sel is None else bidder_codes[sel])[order].astype(np.intp, copy=False)
            del order, b_raw
            if piece_ids is not None:  # allocated after the sort's temporaries are gone
                piece_sums = np.empty((piece_ids.size, k_arms + 1))
            if influence is None or influence.size < big_n:
                influence = np.empty(big_n)
            infl = influence[:big_n]
            rules: list[AllocationRule] = [allocation_rule(a.weights_for(n), n) for a in arms]
            mix = mixture_rule(rules, shares)
            options = {"payment_rule": rule, "floor": floor}
            weights = ([revenue_weights(r, mix, big_n, **options) for r in rules]
                       + [welfare_weights(r, mix, big_n, **options) for r in rules])
            identified = [k < k_arms or bool(np.isfinite(ww.top) and np.isfinite(ww.bottom))
                          for k, ww in enumerate(weights)]
            table = WeightTable([ww for ww, ok in zip(weights, identified) if ok], big_n)
            column = np.cumsum(identified) - 1  # metric k's row in the table
            n_auction_codes = data.n_auctions
            auction_sums = None if auc is None else np.empty((k_arms, n_auction_codes))
            for k, ww in enumerate(weights):
                if k >= k_arms:  # welfare: endpoints of the bid distribution, not the extreme bids
                    if not identified[k]:
                        if "not_identified" not in flags:
                            flags.append("not_identified")
                        continue
                    top_gap, bottom_gap = _endpoint_gaps(sorted_bids)
                    est = _l_statistic(table, int(column[k]), n, sorted_bids, None)
                    est += n * ww.top * (float(sorted_bids[-1]) + top_gap) + n * ww.floor_term
                    if ww.bottom:  # 0 with a floor (its term replaces the bottom bid's)
                        est -= n * ww.bottom * (float(sorted_bids[0]) - bottom_gap)
                    estimate[k] = est
                    continue
                boundary = (n * ww.top * float(sorted_bids[-1]) - n * ww.bottom * float(sorted_bids[0])
                            + n * ww.floor_term)
                est = _l_statistic(table, int(column[k]), n, sorted_bids, infl) + boundary
                if floor is not None:
                    # q* is the share of sub-floor bids: each bid's influence gains slope * (1{b < r} - q*)
                    # (the sub-floor bids are the first n_below sorted ones).
                    add_floor_influence(infl, n_below, n * ww.floor_slope, floor.quantile)
                infl *= 1.0 / big_n
                estimate[k] = est
                if auction_sums is not None:
                    auction_sums[k] = np.bincount(auc, weights=infl, minlength=n_auction_codes)
                if bcs is not None:
                    by_code = np.bincount(bcs, weights=infl, minlength=n_codes)
                    piece_sums[:, k] = by_code if piece_codes is None else by_code[piece_codes]
                    del by_code
            # The estimator is linear in the target rule and the mixture's rule is the share-weighted
            # sum of the arms' rules, so the mixture's revenue (and its influence) is the shares' sum.
            estimate[-1] = float(shares @ estimate[:k_arms])
            if auction_sums is not None:
                block = auction_sums @ auction_sums.T  # arms x arms, CR0
                mix_row = shares @ block
                covariance[np.ix_(range(k_arms), range(k_arms))] = block
                covariance[-1, :k_arms] = covariance[:k_arms, -1] = mix_row
                covariance[-1, -1] = float(mix_row @ shares)
            del auction_sums
            if piece_sums is not None:
                piece_sums[:, k_arms] = piece_sums[:, :k_arms] @ shares
            del sorted_bids, auc, bcs, table
        pieces.append(dict(n=n, a_n=a_n, big_n=big_n, estimate=estimate, covariance=covariance, ids=piece_ids,
                           sums=piece_sums, codes=piece_codes, floor_quantile=floor_quantile, top_bid=top_bid,
                           exponent=exponent, flags=tuple(flags)))
    del influence

    # Realized per-arm sums per stratum, from each auction's realized revenue (its own bids only).
    arm_of_auction = np.zeros(data.n_auctions, dtype=np.int64)
    arm_of_auction[data.auction] = data.arm
    # Computed in the unit of the largest bid (as the pieces' units, a power of two: exact), then
    # brought to each piece's own unit.
    top_exponent = _unit_exponent(float(data.bid.max()))
    if top_exponent:
        scaled = dataclasses.replace(data, bid=np.ldexp(data.bid, -top_exponent))
        revenue = auction_revenues(scaled, experiment, floor=math.ldexp(floor_bid, -top_exponent))
        del scaled
    else:
        revenue = auction_revenues(data, experiment, floor=floor_bid)
    out = []
    for p in pieces:
        n = p["n"]
        mask = n_of_auction == n if strata.size > 1 else None
        rev = revenue if mask is None else revenue[mask]
        arm_k = arm_of_auction if mask is None else arm_of_auction[mask]
        rev = np.ldexp(rev, top_exponent - p["exponent"]) if p["exponent"] != top_exponent else rev
        sums, squares, counts = realized_cell(rev, arm_k, k_arms)
        out.append(StratumPiece(
            n_bidders=int(n), shard=shard, day=day, n_auctions=int(p["a_n"]), n_bids=int(p["big_n"]), labels=labels,
            estimate=p["estimate"], covariance=p["covariance"], bidder_ids=p["ids"], bidder_sums=p["sums"],
            arm_auctions=counts, realized_sum=sums, realized_squares=squares,
            floor_quantile=float(p["floor_quantile"]), max_bid=p["top_bid"], bid_exponent=int(p["exponent"]),
            has_quality=bool(data.has_quality), flags=p["flags"],
            _bidder_codes=p["codes"], _bidder_space=space if p["ids"] is not None else None))
    return out


# -- combine ------------------------------------------------------------------------------------
def _place(pieces: Sequence[StratumPiece]) -> str:
    return ", ".join(_where(p) + f": {p.n_bids} bids" for p in pieces)


def _where(p: StratumPiece) -> str:
    text = f"{p.n_bidders} bidders"
    if p.shard:
        text += f" shard {p.shard}"
    if p.day is not None:
        text += f" on {p.day}"
    return text


def _cr_factor(g: int) -> float:
    return g / (g - 1) if g >= 2 else np.nan


def _codes_of(p: StratumPiece) -> np.ndarray:
    """A piece's codes in its label space (``None`` stands for every code 0..B-1)."""
    return np.arange(p.bidder_ids.size) if p._bidder_codes is None else p._bidder_codes


def _bidder_totals(pieces: Sequence[StratumPiece], weights: np.ndarray) -> tuple[np.ndarray, float]:
    """``S_b = sum_s w_s S_{b,s}`` for every distinct bidder of the pieces (rows), per revenue label (columns).

    Returned as ``(sums, scale)`` with ``S = scale * sums``: one piece holding every bidder of its
    label space (``estimate_arms`` on one stratum) is used as it is, without a copy.
    """
    if len(pieces) == 1 and pieces[0]._bidder_space is not None and pieces[0]._bidder_codes is None:
        return pieces[0].bidder_sums, float(weights[0])  # every code of the space, in order
    space = pieces[0]._bidder_space
    shared = space is not None and all(p._bidder_space is space for p in pieces)
    if shared:
        codes = [_codes_of(p) for p in pieces]  # one label space: no hashing of the ids
        n_codes = int(max(int(c.max()) + 1 if c.size else 0 for c in codes))
    else:
        ids = [p.bidder_ids for p in pieces]
        if all(i.dtype.kind in "iu" for i in ids):
            joined = np.concatenate(ids)
        else:
            joined = np.concatenate([_as_text(i) for i in ids])
        flat, uniques = pd.factorize(joined, sort=False)
        n_codes = len(uniques)
        bounds = np.cumsum([0] + [i.size for i in ids])
        codes = [flat[lo:hi] for lo, hi in zip(bounds[:-1], bounds[1:])]
    n_columns = pieces[0].bidder_sums.shape[1]
    totals = np.zeros((n_columns, n_codes))
    for p, c, w in zip(pieces, codes, weights):
        every = shared and p._bidder_codes is None and c.size == n_codes  # every code of the space, in order
        for j in range(n_columns):
            if every:
                totals[j] += w * p.bidder_sums[:, j]
            else:
                totals[j] += np.bincount(c, weights=w * p.bidder_sums[:, j], minlength=n_codes)
    if shared:
        seen = np.zeros(n_codes, dtype=bool)
        for c in codes:
            seen[c] = True
        if not seen.all():  # codes of the shared space no piece here uses
            totals = totals[:, seen]
    return totals.T, 1.0


def _distinct_bidders(pieces: Sequence[StratumPiece]) -> int:
    space = pieces[0]._bidder_space
    if space is not None and all(p._bidder_space is space for p in pieces):
        if any(p._bidder_codes is None for p in pieces):  # a piece with every code of the space
            return int(max(p.bidder_ids.size for p in pieces if p._bidder_codes is None))
        size = max(int(p._bidder_codes.max()) + 1 if p._bidder_codes.size else 0 for p in pieces)
        seen = np.zeros(size, dtype=bool)
        for p in pieces:
            seen[p._bidder_codes] = True
        return int(seen.sum())
    ids = [p.bidder_ids for p in pieces]
    joined = np.concatenate(ids) if all(i.dtype.kind in "iu" for i in ids) else np.concatenate([_as_text(i) for i in ids])
    return int(pd.unique(joined).size)


def combine_pieces(pieces: Iterable[StratumPiece], experiment: Experiment, *, confidence_level: float = 0.95,
                   cluster: str = "auto", n_excluded_auctions: int = 0, source: str = "bids") -> pd.DataFrame:
    """Combine stratum pieces by their auction counts into the frame of ``estimate_arms``.

    Parameters
    ----------
    pieces : iterable of StratumPiece
        Pieces of independent strata (distinct auctions): the strata of one input, the shards of
        a stratum, the pieces of several days. Pieces with the same ``(day, n_bidders, shard)`` are
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
        Single-bidder auctions left out upstream (reported in ``attrs``).
    source : str, optional
        Name of the input in warnings and errors.

    Returns
    -------
    pandas.DataFrame
        Columns :data:`~counterbid.estimators.RESULT_COLUMNS`, rows, ``status`` and ``attrs`` as
        :func:`~counterbid.estimators.estimate_arms` (``attrs['strata']`` sums the auctions of
        pieces with the same number of bidders).

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
    from .arms import CLUSTERS, METHOD_VERSION, MIN_STRATUM_BIDS, MIXTURE_ARM, RESULT_COLUMNS

    pieces = list(pieces)
    if not isinstance(experiment, Experiment):
        raise InputError("`experiment` must be an Experiment (see load_experiment)")
    if not (isinstance(confidence_level, (int, float)) and not isinstance(confidence_level, bool)
            and 0 < confidence_level < 1):
        raise InputError(f"`confidence_level` must be in (0, 1); got {confidence_level!r}")
    if cluster not in CLUSTERS:
        raise InputError(f"`cluster` must be one of {', '.join(CLUSTERS)}; got {cluster!r}")
    if not pieces:
        raise InputError(f"{source}: no stratum pieces to combine")
    labels = piece_labels(experiment)
    seen_keys = set()
    for p in pieces:
        if not isinstance(p, StratumPiece):
            raise InputError(f"{source}: pieces must be StratumPiece objects; got {type(p).__name__}")
        if p.labels != labels:
            raise InputError(f"{source}: piece of {_where(p)} has labels of other arms than experiment "
                             f"{experiment.id!r} ({', '.join(experiment.arm_names)})")
        if p.key in seen_keys:
            raise InputError(f"{source}: two pieces of {_where(p)} (the same stratum twice)")
        seen_keys.add(p.key)
    confidence_level = float(confidence_level)
    arms = experiment.arms
    k_arms = len(arms)
    n_labels = len(labels)
    revenue_cols = list(range(k_arms)) + [n_labels - 1]

    counts = np.array([p.n_auctions for p in pieces], dtype=np.int64)
    total_auctions = int(counts.sum())
    total_bids = int(sum(p.n_bids for p in pieces))
    pi = counts / total_auctions
    exponent = max(p.bid_exponent for p in pieces)
    unit = np.array([math.ldexp(1.0, p.bid_exponent - exponent) for p in pieces])  # piece unit in the common unit
    w = pi * unit  # weight of each piece's numbers in the combination (common unit)

    estimate = np.zeros(n_labels)
    for p, wi in zip(pieces, w):
        estimate += wi * p.estimate

    # Cluster unit.
    with_sums = all(p.bidder_sums is not None for p in pieces)
    if cluster == "bidder" and not with_sums:
        lacking = next(p for p in pieces if p.bidder_sums is None)
        raise InputError(f"{source}: the piece of {_where(lacking)} has no bidder sums; estimate its stratum with "
                         "cluster='bidder' to combine with bidder clustering")
    n_distinct = _distinct_bidders(pieces) if with_sums and cluster != "auction" else None
    if cluster == "auto":
        cluster = "bidder" if with_sums and n_distinct < total_bids else "auction"

    degenerate = any("degenerate" in p.flags for p in pieces)
    if cluster == "bidder":
        # distinct bidders x revenue labels (revenue_cols' order); the sums are scale x totals
        totals, scale = _bidder_totals(pieces, w)
        factor = _cr_factor(totals.shape[0])
        if totals.shape[0] >= 2:
            block = (factor * scale * scale) * (totals.T @ totals)
        else:
            block = np.full((len(revenue_cols),) * 2, np.nan)
    else:
        totals = None
        block = np.zeros((len(revenue_cols), len(revenue_cols)))
        for p, wi in zip(pieces, w):
            block += (wi * wi) * p.covariance[np.ix_(revenue_cols, revenue_cols)]
        block *= _cr_factor(total_auctions)
    variance = np.full((n_labels, n_labels), np.nan)
    variance[np.ix_(revenue_cols, revenue_cols)] = block
    if degenerate:
        estimate[:] = np.nan

    few = [p for p in pieces if "few_bids" in p.flags]
    if few:
        _warn(f"{source}: strata with fewer than {MIN_STRATUM_BIDS} bids ({_place(few)}): their confidence intervals "
              "under-cover (status 'few_bids'); pool more auctions before reading them")
    welfare = estimate[k_arms:2 * k_arms]
    welfare_identified = not any("not_identified" in p.flags for p in pieces)
    # Welfare is always published without an interval (the spread of the highest bid, which welfare
    # weighs with a point mass, makes normal intervals under-cover): a fixed property, carried by
    # the status flag 'no_interval' and the report's assumptions, not a warning on every run.
    if not welfare_identified:
        _warn("welfare is not identified: the mixture's top two positions weigh the same "
              "(or its bottom positions do), so values at that end cannot be recovered from bids")

    # Realized per-arm average from the pieces' sufficient sums (common unit; squares in its square).
    realized = combine_realized([(p.realized_sum, p.realized_squares, p.arm_auctions, p.n_bidders) for p in pieces],
                                unit)
    realized_mean, realized_se, arm_auctions, arm_bids = realized.mean, realized.std_error, realized.auctions, realized.bids
    mixture_mean, mixture_se = realized.mixture_mean, realized.mixture_std_error

    z = float(stats.norm.ppf(0.5 + confidence_level / 2))
    stratum_flags = (["few_bids"] if few else []) + (["degenerate"] if degenerate else [])
    rows: list[tuple] = []

    def emit(arm: str, metric: str, est: float, se: float, n_auc: int, n_b: int, *, counterfactual: bool = True,
             flags: tuple[str, ...] = ()) -> None:
        status = (list(stratum_flags) if counterfactual else []) + list(flags)
        if np.isfinite(est) and not np.isfinite(se):
            status.append("no_interval")
        rows.append((arm, metric, est, se, est - z * se, est + z * se, n_auc, n_b, ",".join(status) or "ok"))

    def se_of(i: int) -> float:
        return float(np.sqrt(variance[i, i])) if np.isfinite(estimate[i]) else np.nan

    control = experiment.arm_names.index(experiment.control_arm)
    t_c = estimate[control]
    for k, a in enumerate(arms):
        emit(a.name, REVENUE, float(estimate[k]), se_of(k), total_auctions, total_bids)
        emit(a.name, WELFARE, float(welfare[k]), np.nan, total_auctions, total_bids,
             flags=() if welfare_identified or degenerate else ("not_identified",))
        emit(a.name, "realized_revenue_per_auction", float(realized_mean[k]), float(realized_se[k]),
             int(arm_auctions[k]), int(arm_bids[k]), counterfactual=False,
             flags=() if arm_auctions[k] else ("no_auctions",))
        if k != control:
            t_a = estimate[k]
            lift, lift_se = np.nan, np.nan
            if np.isfinite(t_a) and np.isfinite(t_c) and t_c > 0:
                lift = t_a / t_c - 1.0
                r = t_a / t_c
                if totals is not None:
                    cs = totals[:, revenue_cols.index(control)] * -r
                    cs += totals[:, revenue_cols.index(k)]
                    cs *= scale / t_c
                    lift_se = float(np.sqrt(_cr_factor(cs.size) * float(cs @ cs))) if cs.size >= 2 else np.nan
                else:
                    v = variance[k, k] - 2 * r * variance[k, control] + r * r * variance[control, control]
                    lift_se = float(np.sqrt(max(v, 0.0))) / t_c if np.isfinite(v) else np.nan
            emit(a.name, "revenue_lift_vs_control", lift, lift_se, total_auctions, total_bids)
    emit(MIXTURE_ARM, REVENUE, float(estimate[-1]), se_of(n_labels - 1), total_auctions, total_bids)
    emit(MIXTURE_ARM, "realized_revenue_per_auction", mixture_mean, mixture_se, total_auctions, total_bids,
         counterfactual=False)

    out = pd.DataFrame(rows, columns=list(RESULT_COLUMNS))
    out["n_auctions"] = out["n_auctions"].astype("int64")
    out["n_bids"] = out["n_bids"].astype("int64")
    if exponent:
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
    strata: dict[int, int] = {}
    for p in sorted(pieces, key=lambda p: p.n_bidders):
        strata[int(p.n_bidders)] = strata.get(int(p.n_bidders), 0) + int(p.n_auctions)
    out.attrs.update(
        experiment_id=experiment.id,
        confidence_level=confidence_level,
        cluster=cluster,
        n_auctions=total_auctions,
        n_bids=total_bids,
        n_excluded_auctions=int(n_excluded_auctions),
        strata=strata,
        method_version=METHOD_VERSION,
        welfare_identified=welfare_identified,
        payment_rule=experiment.payment_rule,
        floor=float(experiment.floor or 0.0),
        quality=any(p.has_quality for p in pieces),
    )
    return out


def _warn(message: str) -> None:
    warnings.warn(message, EstimatorWarning, stacklevel=4)


# -- plain frames -------------------------------------------------------------------------------
def pieces_to_frames(pieces: Iterable[StratumPiece]) -> dict[str, pd.DataFrame]:
    """Pieces as four plain frames (text, integer, float and bool columns) for a results table.

    Text columns have pandas' string dtype (``str``). Every frame starts with the key columns
    ``day`` (ISO text, missing when the pieces have no day), ``n_bidders``, ``shard``.

    * ``strata``: one row per piece: ``n_auctions, n_bids, max_bid, bid_exponent,
      floor_quantile, has_quality, flags`` (comma-joined, ``''`` for none) and
      ``n_distinct_bidders`` (-1 when the piece keeps no bidder sums).
    * ``arms``: one row per arm and the mixture (``arm_index`` 0..K-1, K for ``_mixture``):
      ``arm, revenue_per_auction, welfare_per_auction`` (the estimates), ``n_auctions``,
      ``realized_revenue_sum``, ``realized_revenue_squares`` (the realized per-arm average's sums;
      the mixture row carries the stratum's auctions and NaN sums).
    * ``covariance``: long, upper triangle, finite entries only: ``arm_i, metric_i, arm_j,
      metric_j, value`` (the piece's CR0 covariance).
    * ``bidder_sums``: long: ``bidder_id`` (text), ``arm`` (an arm or ``_mixture``), ``value``
      (the bidder's revenue influence sum), one row per bidder and revenue label.

    Parameters
    ----------
    pieces : iterable of StratumPiece

    Returns
    -------
    dict of str to pandas.DataFrame
        Keys :data:`PIECE_FRAMES`.
    """
    pieces = list(pieces)
    strata, arms, cov, sums = [], [], [], []
    for p in pieces:
        key = {"day": p.day, "n_bidders": p.n_bidders, "shard": p.shard}
        strata.append({**key, "n_auctions": p.n_auctions, "n_bids": p.n_bids, "max_bid": p.max_bid,
                       "bid_exponent": p.bid_exponent, "floor_quantile": p.floor_quantile,
                       "has_quality": p.has_quality, "flags": ",".join(p.flags),
                       "n_distinct_bidders": -1 if p.bidder_ids is None else int(p.bidder_ids.size)})
        k_arms = (len(p.labels) - 1) // 2
        names = [a for a, _ in p.labels[:k_arms]] + [p.labels[-1][0]]
        revenue = list(range(k_arms)) + [len(p.labels) - 1]
        arms.append(pd.DataFrame({
            **{c: [v] * (k_arms + 1) for c, v in key.items()},
            "arm_index": np.arange(k_arms + 1), "arm": names,
            "revenue_per_auction": p.estimate[revenue],
            "welfare_per_auction": np.append(p.estimate[k_arms:2 * k_arms], np.nan),
            "n_auctions": np.append(p.arm_auctions, p.n_auctions).astype(np.int64),
            "realized_revenue_sum": np.append(p.realized_sum, np.nan),
            "realized_revenue_squares": np.append(p.realized_squares, np.nan),
        }))
        i, j = np.triu_indices(len(p.labels))
        keep = np.isfinite(p.covariance[i, j])
        i, j = i[keep], j[keep]
        cov.append(pd.DataFrame({
            **{c: [v] * i.size for c, v in key.items()},
            "arm_i": [p.labels[x][0] for x in i], "metric_i": [p.labels[x][1] for x in i],
            "arm_j": [p.labels[x][0] for x in j], "metric_j": [p.labels[x][1] for x in j],
            "value": p.covariance[i, j],
        }))
        if p.bidder_ids is not None:
            b = p.bidder_ids.size
            rows = b * (k_arms + 1)
            # text columns built once per distinct value and repeated by ``take`` (no per-row conversion)
            sums.append(pd.DataFrame({
                "day": pd.array([p.day], dtype="str").take(np.zeros(rows, dtype=np.intp)),
                "n_bidders": np.full(rows, p.n_bidders, dtype=np.int64),
                "shard": np.full(rows, p.shard, dtype=np.int64),
                "bidder_id": pd.array(_as_text(p.bidder_ids), dtype="str").take(np.tile(np.arange(b), k_arms + 1)),
                "arm": pd.array(names, dtype="str").take(np.repeat(np.arange(k_arms + 1), b)),
                "value": p.bidder_sums.T.ravel(),
            }))
    key_types = {"day": "str", "n_bidders": np.int64, "shard": np.int64}
    columns = {
        "strata": {**key_types, "n_auctions": np.int64, "n_bids": np.int64, "max_bid": float, "bid_exponent": np.int64,
                   "floor_quantile": float, "has_quality": bool, "flags": "str", "n_distinct_bidders": np.int64},
        "arms": {**key_types, "arm_index": np.int64, "arm": "str", "revenue_per_auction": float,
                 "welfare_per_auction": float, "n_auctions": np.int64, "realized_revenue_sum": float,
                 "realized_revenue_squares": float},
        "covariance": {**key_types, "arm_i": "str", "metric_i": "str", "arm_j": "str", "metric_j": "str",
                       "value": float},
        "bidder_sums": {**key_types, "bidder_id": "str", "arm": "str", "value": float},
    }
    parts = {"strata": [pd.DataFrame(strata)] if strata else [], "arms": arms, "covariance": cov, "bidder_sums": sums}
    out = {}
    for name, types in columns.items():
        frame = pd.concat(parts[name], ignore_index=True) if parts[name] else pd.DataFrame(columns=list(types))
        out[name] = frame[list(types)].astype(types)
    return out


def pieces_from_frames(frames: dict[str, pd.DataFrame]) -> list[StratumPiece]:
    """The pieces :func:`pieces_to_frames` wrote (or the same frames read back from a table).

    Pieces are identified by ``(day, n_bidders, shard)``; bidder ids come back as text. Extra
    columns (an experiment id, say) are ignored.

    Parameters
    ----------
    frames : dict of str to pandas.DataFrame
        Keys :data:`PIECE_FRAMES`.

    Returns
    -------
    list of StratumPiece
        In the order of the ``strata`` frame.
    """
    from .arms import MIXTURE_ARM

    missing = [name for name in PIECE_FRAMES if name not in frames]
    if missing:
        raise InputError(f"piece frames: frame {missing[0]!r} is missing (need {', '.join(PIECE_FRAMES)})")

    def keyed(frame: pd.DataFrame) -> dict:
        frame = frame.reset_index(drop=True)
        day = frame["day"].astype(object).where(frame["day"].notna(), "\0none")
        groups = pd.DataFrame({"day": day, "n": frame["n_bidders"], "s": frame["shard"]}).groupby(
            ["day", "n", "s"], sort=False).indices
        return {(None if d == "\0none" else str(d), int(n), int(s)): frame.iloc[idx] for (d, n, s), idx in groups.items()}

    arms_of = keyed(frames["arms"])
    cov_of = keyed(frames["covariance"])
    sums_of = keyed(frames["bidder_sums"])
    pieces = []
    for _, row in frames["strata"].reset_index(drop=True).iterrows():
        day = None if pd.isna(row["day"]) else str(row["day"])
        key = (day, int(row["n_bidders"]), int(row["shard"]))
        where = f"piece {key}"
        if key not in arms_of:
            raise InputError(f"piece frames: {where} has no rows in 'arms'")
        arms = arms_of[key].sort_values("arm_index")
        names = arms["arm"].tolist()
        if not names or names[-1] != MIXTURE_ARM:
            raise InputError(f"piece frames: {where}: the last arm row must be {MIXTURE_ARM!r}")
        k_arms = len(names) - 1
        labels = tuple([(a, REVENUE) for a in names[:k_arms]] + [(a, WELFARE) for a in names[:k_arms]]
                       + [(MIXTURE_ARM, REVENUE)])
        index = {label: x for x, label in enumerate(labels)}
        revenue = arms["revenue_per_auction"].to_numpy(dtype=float)
        estimate = np.concatenate([revenue[:k_arms], arms["welfare_per_auction"].to_numpy(dtype=float)[:k_arms],
                                   revenue[k_arms:]])
        covariance = np.full((len(labels), len(labels)), np.nan)
        if key in cov_of:
            c = cov_of[key]
            try:
                i = np.array([index[(a, m)] for a, m in zip(c["arm_i"], c["metric_i"])], dtype=np.intp)
                j = np.array([index[(a, m)] for a, m in zip(c["arm_j"], c["metric_j"])], dtype=np.intp)
            except KeyError as err:
                raise InputError(f"piece frames: {where}: covariance names an unknown label {err.args[0]!r}") from None
            covariance[i, j] = covariance[j, i] = c["value"].to_numpy(dtype=float)
        bidder_ids = bidder_sums = None
        if int(row["n_distinct_bidders"]) >= 0:
            s = sums_of.get(key)
            if s is None:
                raise InputError(f"piece frames: {where} has {int(row['n_distinct_bidders'])} bidders but no rows in "
                                 "'bidder_sums'")
            codes, uniques = pd.factorize(s["bidder_id"].astype(str), sort=False)
            column = pd.Index(names).get_indexer(s["arm"])  # the column of sum_labels: arms, then _mixture
            if (column < 0).any():
                raise InputError(f"piece frames: {where}: bidder_sums names an unknown arm "
                                 f"{s['arm'].to_numpy()[np.flatnonzero(column < 0)[0]]!r}")
            bidder_ids = np.asarray(uniques, dtype=object)
            bidder_sums = np.full((bidder_ids.size, k_arms + 1), np.nan)
            bidder_sums[codes, column] = s["value"].to_numpy(dtype=float)
        flags = tuple(f for f in str(row["flags"] if not pd.isna(row["flags"]) else "").split(",") if f)
        pieces.append(StratumPiece(
            n_bidders=key[1], shard=key[2], day=day, n_auctions=int(row["n_auctions"]), n_bids=int(row["n_bids"]),
            labels=labels, estimate=estimate, covariance=covariance, bidder_ids=bidder_ids, bidder_sums=bidder_sums,
            arm_auctions=arms["n_auctions"].to_numpy(dtype=np.int64)[:k_arms],
            realized_sum=arms["realized_revenue_sum"].to_numpy(dtype=float)[:k_arms],
            realized_squares=arms["realized_revenue_squares"].to_numpy(dtype=float)[:k_arms],
            floor_quantile=_number(row["floor_quantile"]), max_bid=_number(row["max_bid"]),
            bid_exponent=int(row["bid_exponent"]), has_quality=bool(row["has_quality"]), flags=flags))
    return pieces


def _number(value) -> float:
    """A stored float, NaN where the sink gave back a null (PostgreSQL stores NaN written by COPY as null)."""
    return np.nan if value is None or pd.isna(value) else float(value)
