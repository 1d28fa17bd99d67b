"""Dependence of bids within auctions: the intra-auction correlation of normal scores.

Under the model every auction of a stratum draws its bidders' values independently from one
distribution, so the bids of one auction are independent draws from the stratum's bid
distribution. Auctions that differ in a way the spec does not declare (segments pooled into one
stratum, an auction-level factor that scales every value of the auction) make the bids of one
auction move together. This module measures that: each bid becomes the normal score of its rank
within its stratum, and the statistic is the correlation of the scores of two bids of the same
auction (docs/method.md, "Auctions that differ: the dependence check").

Pure numpy/scipy; :func:`~counterbid.estimators.checks.equilibrium_checks` turns the result into a
check.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special, stats

from .errors import InputError

__all__ = ["AuctionDependence", "StratumDependence", "auction_dependence"]


@dataclass(frozen=True)
class StratumDependence:
    """The statistic of one stratum.

    Attributes
    ----------
    key : int
        The stratum's key (the number of bidders, when the caller strata by it).
    n_auctions, n_bids : int
    n_pairs : int
        Unordered pairs of bids within an auction, ``P = sum_j n_j (n_j - 1) / 2``.
    correlation : float
        ``r = sum_j (S_j^2 - Q_j) / (2 P)`` on standardised scores (NaN when every bid is tied).
    null_mean : float
        Its expectation under independence, ``-1 / (N - 1)``.
    standard_error : float
        ``P^(-1/2)``, its standard error under independence.
    """

    key: int
    n_auctions: int
    n_bids: int
    n_pairs: int
    correlation: float
    null_mean: float
    standard_error: float


@dataclass(frozen=True)
class AuctionDependence:
    """Intra-auction correlation of normal scores, pooled over strata.

    Attributes
    ----------
    correlation : float
        Pooled ``r``: the strata's numerators summed over their pair counts summed.
    null_mean : float
        Its expectation under independence (pair-weighted ``-1 / (N_s - 1)``).
    standard_error : float
        ``(sum_s P_s)^(-1/2)``, its standard error under independence.
    n_pairs : int
        Pairs of bids within an auction, over the strata that count (not all tied).
    strata : tuple of StratumDependence
        Per stratum, in ascending key order.
    """

    correlation: float
    null_mean: float
    standard_error: float
    n_pairs: int
    strata: tuple[StratumDependence, ...]

    @property
    def excess(self) -> float:
        """``correlation - null_mean``: the dependence beyond what independence gives."""
        return self.correlation - self.null_mean

    @property
    def z(self) -> float:
        """``excess / standard_error`` (about standard normal under independence)."""
        return self.excess / self.standard_error if self.n_pairs else float("nan")

    @property
    def p_value(self) -> float:
        """One-sided p-value of ``z`` (positive dependence: what pooled heterogeneity makes)."""
        return float(stats.norm.sf(self.z)) if self.n_pairs else float("nan")


def _dependence_iv(bid, auction, stratum) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    bid = np.asarray(bid, dtype=float)
    auction = np.asarray(auction)
    if bid.ndim != 1 or auction.shape != bid.shape:
        raise InputError(f"`bid` and `auction` must be 1-d arrays of one length; got shapes {bid.shape} and {auction.shape}")
    if bid.size == 0:
        raise InputError("`bid` is empty: no auction to measure")
    if not np.issubdtype(auction.dtype, np.integer) or auction.min() < 0:
        raise InputError("`auction` must hold integer auction codes >= 0")
    bad = np.flatnonzero(~np.isfinite(bid))
    if bad.size:
        raise InputError(f"`bid` row {int(bad[0])} is not finite: {bid[bad[0]]}")
    if stratum is not None:
        stratum = np.asarray(stratum)
        if stratum.shape != bid.shape or not np.issubdtype(stratum.dtype, np.integer):
            raise InputError(f"`stratum` must be integer keys, one per bid; got dtype {stratum.dtype}, shape {stratum.shape}")
    return bid, auction.astype(np.intp, copy=False), stratum


def _rank_scores(b: np.ndarray) -> np.ndarray:
    """``ndtri((R - 1/2) / N)`` of each bid's mid-rank ``R``, from one ``argsort``.

    The same numbers as ``scipy.stats.rankdata(b, method="average")`` fed to ``ndtri`` (tested),
    at a fifth of its time on millions of bids: a tie group at sorted positions ``k .. k + m - 1``
    (0-based) has mid-rank ``k + (m + 1) / 2``, so ``R - 1/2 = k + m / 2``.
    """
    n = b.size
    order = np.argsort(b)
    ordered = b[order]
    starts = np.flatnonzero(np.r_[True, ordered[1:] != ordered[:-1]])
    del ordered
    if starts.size == n:  # no ties
        in_order = special.ndtri((np.arange(n) + 0.5) / n)
    else:
        sizes = np.diff(np.r_[starts, n])
        in_order = np.repeat(special.ndtri((starts + sizes / 2) / n), sizes)
    z = np.empty(n)
    z[order] = in_order
    return z


def _normal_scores(b: np.ndarray) -> np.ndarray | None:
    """Centred, unit-variance normal scores of mid-ranks; ``None`` when every bid is tied."""
    z = _rank_scores(b)
    z -= z.mean()  # mid-ranks of ties need not be symmetric: centre exactly
    s2 = float(np.dot(z, z)) / z.size
    if not s2 > 0:
        return None
    z /= np.sqrt(s2)
    return z


def auction_dependence(bid, auction, stratum=None) -> AuctionDependence:
    """Intra-auction correlation of the normal scores of within-stratum bid ranks.

    Parameters
    ----------
    bid : array_like of float
        One bid per row (effective bids when auctions rank by quality).
    auction : array_like of int
        Auction code of each bid (codes ``>= 0``; an auction lies in one stratum).
    stratum : array_like of int, optional
        Stratum key of each bid (e.g. the number of bidders of its auction). Default: one stratum.

    Returns
    -------
    AuctionDependence

    Raises
    ------
    InputError
        Arrays of different lengths, a non-finite bid, negative or non-integer codes, or an
        auction whose bids lie in two strata (the message names it).

    Notes
    -----
    Per stratum ``s`` of ``N`` bids: ``z = ndtri((R - 1/2) / N)`` of each bid's mid-rank ``R``,
    centred and divided by its root mean square (so the scores have mean 0 and variance 1 exactly,
    ties included). With ``S_j = sum_i z_ij`` and ``Q_j = sum_i z_ij^2`` per auction,
    ``r_s = sum_j (S_j^2 - Q_j) / sum_j n_j (n_j - 1)``: the mean product of the scores of two
    distinct bids of one auction, i.e. their correlation. Under independence the ranks are a
    uniformly random permutation (whatever the value distribution and the increasing bid
    function), so ``E r_s = -1 / (N - 1)`` exactly and ``Var r_s ~= 1 / P_s`` with
    ``P_s = sum_j n_j (n_j - 1) / 2`` (products of distinct pairs are uncorrelated with variance
    ``~1``). Pooled: numerators and pair counts are summed over strata. Cost: one ``argsort``
    per stratum and two ``np.bincount`` by auction (docs/method.md, "Auctions that differ: the
    dependence check").

    References
    ----------
    .. [1] Van der Waerden, B. L. (1952). Order tests for the two-sample problem and their power.
       Indagationes Mathematicae 14 (normal scores of ranks).
    .. [2] Fisher, R. A. (1925). Statistical Methods for Research Workers, ch. 7 (the
       intraclass correlation).

    Examples
    --------
    >>> rng = np.random.default_rng(1)
    >>> auction = np.repeat(np.arange(20_000), 4)
    >>> shared = np.repeat(rng.normal(size=20_000), 4)
    >>> independent = auction_dependence(rng.lognormal(size=auction.size), auction)
    >>> bool(abs(independent.z) < 4)
    True
    >>> pooled = auction_dependence(np.exp(shared + rng.normal(size=auction.size)), auction)
    >>> round(pooled.correlation, 1), bool(pooled.z > 100)
    (0.5, True)
    """
    bid, auction, stratum = _dependence_iv(bid, auction, stratum)
    n_auctions = int(auction.max()) + 1
    size = np.bincount(auction, minlength=n_auctions).astype(float)
    keys = np.zeros(1, dtype=np.int64) if stratum is None else np.unique(stratum)
    code = None if keys.size == 1 else np.searchsorted(keys, stratum)
    z = np.zeros(bid.size)
    counted = np.zeros(keys.size, dtype=bool)
    n_bids = np.zeros(keys.size, dtype=np.int64)
    for s in range(keys.size):
        rows = slice(None) if code is None else np.flatnonzero(code == s)
        part = bid[rows]
        n_bids[s] = part.size
        scores = _normal_scores(part)
        if scores is not None:
            z[rows], counted[s] = scores, True
    auction_code = np.zeros(n_auctions, dtype=np.intp)
    if code is not None:
        auction_code[auction] = code
        mixed = np.flatnonzero(auction_code[auction] != code)
        if mixed.size:
            raise InputError(f"auction code {int(auction[mixed[0]])} has bids in two strata")
    total = np.bincount(auction, weights=z, minlength=n_auctions)
    squares = np.bincount(auction, weights=z * z, minlength=n_auctions)
    used = size > 0
    numerator = np.bincount(auction_code[used], weights=(total * total - squares)[used], minlength=keys.size)
    ordered_pairs = np.bincount(auction_code[used], weights=(size * (size - 1))[used], minlength=keys.size)
    auctions = np.bincount(auction_code[used], minlength=keys.size)
    return _pooled(keys, counted, n_bids, auctions, numerator, ordered_pairs)


def _pooled(keys, counted, n_bids, auctions, numerator, ordered_pairs) -> AuctionDependence:
    """Per-stratum results and their pooled correlation (strata where every bid ties are left out)."""
    strata = []
    for s, key in enumerate(keys):
        pairs = int(round(ordered_pairs[s] / 2))
        ok = counted[s] and pairs > 0
        strata.append(StratumDependence(
            key=int(key), n_auctions=int(auctions[s]), n_bids=int(n_bids[s]), n_pairs=pairs,
            correlation=float(numerator[s] / ordered_pairs[s]) if ok else float("nan"),
            null_mean=-1.0 / (n_bids[s] - 1) if n_bids[s] > 1 else float("nan"),
            standard_error=pairs ** -0.5 if ok else float("nan")))
    use = counted & (ordered_pairs > 0)
    pairs = float(ordered_pairs[use].sum())
    if pairs == 0:
        return AuctionDependence(float("nan"), float("nan"), float("nan"), 0, tuple(strata))
    null = float(np.sum(ordered_pairs[use] * -1.0 / (n_bids[use] - 1)) / pairs)
    return AuctionDependence(correlation=float(numerator[use].sum() / pairs), null_mean=null,
                             standard_error=(pairs / 2) ** -0.5, n_pairs=int(round(pairs / 2)), strata=tuple(strata))
