"""Bid preparation: validate a bid log against the data contract and an experiment, and sort bids.

:func:`prepare_bids` turns a bids frame into :class:`PreparedBids` (flat arrays, single-bidder
auctions left out, one error line naming the column and row at fault); :func:`sorted_with_order`
is the one sort of a stratum's bids (the stable order, without an ``argsort`` of the whole array).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from ._validate import check_experiment
from .bid_contract import BID_CONTRACT, INTEGER_RANGE
from .covariate_columns import auction_covariates, check_constant_within_auctions
from .errors import InputError, no_pieces_error
from .spec import Experiment

__all__ = [
    "BID_COLUMNS",
    "NULL_SEGMENT",
    "PreparedBids",
    "REQUIRED_BID_COLUMNS",
    "prepare_bids",
    "segment_label",
    "sort_order",
    "sorted_with_order",
]

#: Columns of the bids data contract that the estimator reads (``quality`` only when the log has it).
BID_COLUMNS = ("auction_id", "bidder_id", "arm", "bid", "position", "quality")
#: Of those, the ones every log must have.
REQUIRED_BID_COLUMNS = tuple(c for c in BID_COLUMNS if not BID_CONTRACT[c].optional)


@dataclass(frozen=True)
class PreparedBids:
    """Validated bids of one experiment as flat arrays (single-bidder auctions removed).

    Attributes
    ----------
    bid : ndarray of float64
        The effective bid: ``bid * quality`` when the log has a ``quality`` column, else the bid
        (then it may share memory with the input frame; read only). Auctions rank by it and the
        floor applies to it.
    auction : ndarray of int32 or intp
        Auction codes 0..n_auctions-1.
    bidder : ndarray of integers
        Bidder labels: equal label, same bidder (the ids themselves when they are small
        non-negative integers, else codes).
    arm : ndarray of int8
        Index into ``experiment.arms`` of the arm the bid's auction ran.
    position : ndarray of int8, int16 or int32
        1 = top, 0 = not shown.
    n_bidders : ndarray of uint8 or int32
        Bids in the bid's auction.
    n_excluded_auctions : int
        Single-bidder auctions left out.
    n_excluded_bids : int
    has_quality : bool
        Whether the log had a ``quality`` column (``bid`` is then the effective bid).
    segment : ndarray of int32 or None
        Per bid, the index into ``segment_names`` of its auction's segment (``None``: the
        experiment declares no segments).
    segment_names : tuple of str
        Label of each segment code (:func:`segment_label`), sorted.
    bidder_ids : ndarray or None
        The log's bidder id of each label (``bidder_ids[bidder[i]]`` is bid ``i``'s bidder id:
        int64 for integer ids, str objects for text), or ``None`` when the labels are the ids
        themselves (non-negative integer ids). Strata estimated from different logs (days,
        shards) meet on these ids (:mod:`.combine`).
    covariates : ndarray of float64, shape (N, p), or None
        Each bid's auction values of the spec's ``scale_covariates`` (``None``: none declared).
    """

    bid: np.ndarray
    auction: np.ndarray
    bidder: np.ndarray
    arm: np.ndarray
    position: np.ndarray
    n_bidders: np.ndarray
    n_auctions: int
    n_excluded_auctions: int
    n_excluded_bids: int
    has_quality: bool = False
    bidder_ids: np.ndarray | None = None
    segment: np.ndarray | None = None
    segment_names: tuple[str, ...] = ()
    covariates: np.ndarray | None = None


def _row(rows: np.ndarray | None, i: int) -> int:
    """Row ``i`` of the validated frame as a row of the caller's frame (``None``: the same)."""
    return int(i if rows is None else rows[i])


def _value(x) -> str:
    """A cell value as it reads in an error line (numpy scalars unwrapped)."""
    return repr(x.item() if isinstance(x, np.generic) else x)


def _auction_codes(ids: pd.Series) -> np.ndarray:
    """Codes 0..A-1 of the auction ids in order of first appearance (``pd.factorize(sort=False)``).

    Bid logs are usually written auction by auction. When integer ids (or a categorical's codes:
    text ids as the reader returns them) never decrease, the code of a row is the number of id
    changes before it: the same codes as factorize, without hashing (int32 when they fit, else intp).
    """
    if isinstance(ids.dtype, pd.CategoricalDtype) and len(ids) > 1:
        values = ids.cat.codes.to_numpy()  # no nulls here (checked before): codes order like distinct ids
    elif pd.api.types.is_integer_dtype(ids) and not ids.hasnans and len(ids) > 1:
        values = ids.to_numpy()
    else:
        values = None
    if values is not None:
        if bool(np.all(values[1:] >= values[:-1])):
            codes = np.empty(values.size, dtype=np.int32 if values.size < 2**31 else np.intp)
            codes[0] = 0
            np.not_equal(values[1:], values[:-1], out=codes[1:])
            np.cumsum(codes[1:], out=codes[1:])
            return codes
    return pd.factorize(ids, sort=False)[0]


def _is_sorted(codes: np.ndarray) -> bool:
    return bool(np.all(codes[1:] >= codes[:-1]))


def _is_plain_integer(col: pd.Series) -> bool:
    """A numpy-backed integer column (it cannot hold nulls)."""
    return isinstance(col.dtype, np.dtype) and col.dtype.kind in "iu"


def _as_text(col: pd.Series) -> tuple[np.ndarray, list]:
    """Codes and distinct values of a label column, values as strings (``pd.factorize`` semantics).

    Categorical columns (what the command line reads string columns as) use their codes
    directly; string columns are factorized as they are; anything else is read as text first.
    """
    if isinstance(col.dtype, pd.CategoricalDtype):
        return col.cat.codes.to_numpy(), [str(c) for c in col.cat.categories]
    if not pd.api.types.is_string_dtype(col) or col.dtype == object:
        col = col.astype("string")
    codes, uniques = pd.factorize(col, sort=False)
    return codes, list(uniques)


#: The contract's rule for ``bid`` (kind ``numeric``: any numpy/pandas numeric dtype but bool, or
#: ``decimal.Decimal`` objects, which is how pandas holds Parquet decimals; read as float64).
_BID = BID_CONTRACT["bid"]


def _holds_decimals(col: pd.Series) -> bool:
    return col.dtype == object and pd.api.types.infer_dtype(col, skipna=True) == "decimal"


def _refuse_beyond_int64(col: pd.Series, name: str, rows: np.ndarray | None, source: str) -> None:
    """Python integers (128-bit ids held as objects) must fit in int64, as everywhere in the contract."""
    if pd.api.types.infer_dtype(col, skipna=True) not in ("integer", "decimal", "mixed-integer"):
        return
    low, high = INTEGER_RANGE
    for i, v in enumerate(col.to_numpy()):
        if isinstance(v, (int, np.integer)) or (v is not None and hasattr(v, "as_integer_ratio") and not isinstance(v, float)):
            if not low <= int(v) <= high:
                raise InputError(f"{source}: column {name!r} row {_row(rows, i)} is {int(v)}, outside the int64 range "
                                 "the bids data contract allows for integers")


def _bidder_labels(ids: pd.Series) -> tuple[np.ndarray, int, np.ndarray | None]:
    """Integer labels of bidder ids (equal label = same bidder), an upper bound on them, and the id of each label.

    Non-negative integer ids below 2**31 are their own labels (ids ``None``), and so are a
    categorical's codes (no copy, no hashing; ids its categories); anything else is factorized.
    """
    if isinstance(ids.dtype, pd.CategoricalDtype):  # text ids as the reader returns them: codes are labels
        return ids.cat.codes.to_numpy(), max(len(ids.cat.categories), 1), _id_array(ids.cat.categories)
    if _is_plain_integer(ids) and len(ids):
        values = ids.to_numpy()
        lo, hi = int(values.min()), int(values.max())
        if lo >= 0 and hi < 2**31:
            return values, hi + 1, None
    codes, uniques = pd.factorize(ids, sort=False)
    return codes, len(uniques), _id_array(uniques)


def _id_array(values) -> np.ndarray:
    """Distinct ids as int64 (integer ids) or str objects (anything else, as text)."""
    values = pd.Index(values)
    if pd.api.types.is_integer_dtype(values.dtype):
        return values.to_numpy(dtype=np.int64)
    kind = pd.api.types.infer_dtype(values, skipna=False)
    if kind == "integer":
        return values.to_numpy(dtype=np.int64)
    if kind == "string":  # already text: no copy of the strings
        return values.to_numpy(dtype=object)
    return np.array([str(v) for v in values], dtype=object)


#: Rows per block of the duplicate-bidder check on logs written auction by auction.
_PAIR_BLOCK = 2**20
#: Longest auction (in bids) for which the duplicate-bidder check of a log written auction by auction
#: compares each bid with the next ones of its run instead of sorting: ``longest - 1`` passes of two
#: comparisons over the rows, against a sort of the packed pairs.
_NEIGHBOUR_CHECK_MAX_RUN = 16


def _repeats_within_runs(auction: np.ndarray, bidder: np.ndarray, longest: int) -> bool:
    """Whether two rows of one run of equal auction codes carry the same bidder label.

    For rows in runs (a log written auction by auction) of at most ``longest`` rows, two rows of
    one auction are at most ``longest - 1`` rows apart, so comparing every row with the ``d``-th
    next for ``d = 1 .. longest - 1`` finds every repeated (auction, bidder) pair; no sort.
    """
    for d in range(1, int(longest)):
        same = np.equal(auction[d:], auction[:-d])
        same &= np.equal(bidder[d:], bidder[:-d])
        if same.any():
            return True
    return False


def _refuse_repeated_bidders(auction: np.ndarray, bidder: np.ndarray, n_bidder_labels: int, bids: pd.DataFrame,
                             rows: np.ndarray | None, source: str, *, contiguous: bool,
                             longest: int | None = None) -> None:
    """Raise when a bidder bids twice in one auction (duplicate rows of the log, say).

    Pairs are packed into one int64 key ``auction * B + bidder``; a duplicate is an equal
    neighbour after sorting (``np.sort``; which of two equal keys comes first does not matter).
    When the auction codes never decrease (a log written auction by auction) a duplicate can
    only sit inside one run of rows: with runs of at most :data:`_NEIGHBOUR_CHECK_MAX_RUN` rows
    (``longest``, the largest auction) each row is compared with the next ones of its run
    (:func:`_repeats_within_runs`), else the keys are sorted a block of whole auctions at a time.
    Whichever way finds a duplicate, the message comes from the sort of every pair (the first
    row whose pair repeats), so it does not depend on the way.
    """
    n = auction.size
    if contiguous and longest is not None and longest <= _NEIGHBOUR_CHECK_MAX_RUN:
        if not _repeats_within_runs(auction, bidder, longest):
            return
        contiguous = False  # a duplicate: the plain check below names it
    n_auction_codes = int(auction[-1] if contiguous else auction.max()) + 1
    packable = n_auction_codes * max(n_bidder_labels, 1) < 2**62
    if packable and contiguous:
        lo = 0
        while lo < n:
            hi = min(n, lo + _PAIR_BLOCK)
            if hi < n:  # cut at an auction boundary
                cut = int(np.searchsorted(auction, auction[hi], side="left"))
                hi = cut if cut > lo else int(np.searchsorted(auction, auction[lo], side="right"))
            pair = auction[lo:hi].astype(np.int64)
            pair *= n_bidder_labels
            pair += bidder[lo:hi]
            pair.sort()
            if (pair[1:] == pair[:-1]).any():
                break
            lo = hi
        else:
            return
    if packable:
        pair = auction.astype(np.int64)
        pair *= n_bidder_labels
        pair += bidder
    else:  # too many codes to pack: hash the pairs instead
        pair = pd.factorize(pd.MultiIndex.from_arrays([auction, bidder]))[0]
    ordered = np.sort(pair)
    if not (ordered[1:] == ordered[:-1]).any():
        return
    del ordered
    i = int(np.flatnonzero(pd.Series(pair).duplicated(keep=False).to_numpy())[0])
    j = int(np.flatnonzero(pair == pair[i])[1])
    raise InputError(
        f"{source}: bidder {_value(bids['bidder_id'].iloc[i])} bids twice in auction "
        f"{_value(bids['auction_id'].iloc[i])} (rows {_row(rows, i)} and {_row(rows, j)}); duplicate rows?"
    )


def prepare_bids(bids: pd.DataFrame, experiment: Experiment, *, source: str = "bids") -> PreparedBids:
    """Validate a bids frame against the data contract and an experiment spec.

    Parameters
    ----------
    bids : pandas.DataFrame
        One row per bid with columns ``auction_id, bidder_id, arm, bid, position``; when it has an
        ``experiment_id`` column only that experiment's rows are used. Extra columns are ignored.
    experiment : Experiment
    source : str
        Name of the input in error messages (a file path, a partition).

    Returns
    -------
    PreparedBids

    Raises
    ------
    InputError
        With one line naming the column and the (0-based) row at fault.
    """
    if not isinstance(bids, pd.DataFrame):
        raise InputError(f"{source}: bids must be a pandas DataFrame")
    check_experiment(experiment)
    rows = None  # rows of ``bids`` kept; None while that is all of them
    if "experiment_id" in bids.columns:
        codes, names = _as_text(bids["experiment_id"])
        keep = codes == (names.index(experiment.id) if experiment.id in names else -2)
        if not keep.all():
            bids, rows = bids.loc[keep], np.flatnonzero(keep)
        del keep, codes
    if len(bids) == 0:
        raise InputError(f"{source}: no bids for experiment {experiment.id!r}")
    missing = [c for c in REQUIRED_BID_COLUMNS if c not in bids.columns]
    if missing:
        raise InputError(f"{source}: column {missing[0]!r} is missing (required: {', '.join(REQUIRED_BID_COLUMNS)})")

    col = bids["bid"]
    if _holds_decimals(col):  # how pandas holds Parquet decimals (money as warehouses export it)
        col = pd.Series(col.to_numpy(dtype=float, na_value=np.nan), index=col.index)
    if pd.api.types.is_bool_dtype(col) or not pd.api.types.is_numeric_dtype(col):
        coerced = pd.to_numeric(col, errors="coerce")
        bad = np.flatnonzero(coerced.isna().to_numpy() & col.notna().to_numpy())
        i = int(bad[0]) if bad.size else 0
        raise InputError(
            f"{source}: column 'bid' must be numeric (dtype {col.dtype}); row {_row(rows, i)} holds {_value(col.iloc[i])}"
        )
    if col.dtype == np.float64:
        bid = col.to_numpy()  # no copy; never written to
    else:
        bid = col.to_numpy(dtype=float, na_value=np.nan)
    low, high = bid.min(), bid.max()  # NaN propagates into both
    floor = _BID.lower_bound
    if not (low >= floor and high < np.inf):  # False for NaN too; the loop names the first fault
        for test, what in ((np.isnan, "NaN or null"), (np.isinf, "infinite"), (lambda a: a < floor, "negative")):
            bad = np.flatnonzero(test(bid))
            if bad.size:
                raise InputError(f"{source}: column 'bid' row {_row(rows, int(bad[0]))} is {what} ({bid[bad[0]]!r})")
    if experiment.max_bid is not None and high > experiment.max_bid:
        _refuse_bids_above_max(bid, experiment, rows, source)

    has_quality = "quality" in bids.columns
    if has_quality:  # auctions rank by bid x quality: everything from here on uses the effective bid
        bid = bid * _qualities(bids["quality"], rows, source)

    for name in ("auction_id", "bidder_id", "arm"):
        if _is_plain_integer(bids[name]):
            continue
        if not BID_CONTRACT[name].nullable:
            nulls = np.flatnonzero(bids[name].isna().to_numpy())
            if nulls.size:
                raise InputError(f"{source}: column {name!r} row {_row(rows, int(nulls[0]))} is null")
        if BID_CONTRACT[name].accepts_integer and bids[name].dtype == object:
            _refuse_beyond_int64(bids[name], name, rows, source)

    arm_codes, arm_uniques = _as_text(bids["arm"])
    spec_index = {name: k for k, name in enumerate(experiment.arm_names)}
    for k, name in enumerate(arm_uniques):
        if name not in spec_index:
            found = np.flatnonzero(arm_codes == k)
            if found.size:  # a category no row uses does not matter
                raise InputError(
                    f"{source}: unknown arm {name!r} at row {_row(rows, int(found[0]))} "
                    f"(experiment {experiment.id!r} has arms: {', '.join(experiment.arm_names)})"
                )
    arm_dtype = np.int8 if len(experiment.arms) < 128 else np.int32
    lookup = np.array([spec_index.get(name, 0) for name in arm_uniques] or [0], dtype=arm_dtype)
    if np.array_equal(lookup, np.arange(lookup.size)) and arm_codes.dtype == arm_dtype:
        arm = arm_codes  # categories already in spec order: the codes are the arm indices
    else:
        arm = lookup[arm_codes]
    del arm_codes

    position = _positions(bids["position"], rows, source)
    if experiment.floor:
        _refuse_bids_against_floor(bid, position, float(experiment.floor), rows, source, has_quality=has_quality)

    auction = _auction_codes(bids["auction_id"])
    n_all = int(auction.max()) + 1
    contiguous = _is_sorted(auction)  # written auction by auction: runs of rows, no scatter or gather
    if contiguous:
        starts = np.flatnonzero(auction[1:] != auction[:-1]) + 1
        counts = np.diff(starts, prepend=0, append=auction.size)
        starts = np.concatenate([[0], starts])
        split = np.flatnonzero(np.repeat(arm[starts], counts) != arm)
        del starts
    else:
        first_arm = np.empty(n_all, dtype=arm.dtype)
        first_arm[auction[::-1]] = arm[::-1]  # the first bid of each auction wins
        split = np.flatnonzero(first_arm[auction] != arm)
        del first_arm
        counts = np.bincount(auction, minlength=n_all)
    if split.size:
        i = int(split[0])
        a = auction[i]
        j = int(np.flatnonzero(auction == a)[0])
        raise InputError(
            f"{source}: auction {_value(bids['auction_id'].iloc[i])} has bids under two arms "
            f"({experiment.arm_names[arm[j]]!r} at row {_row(rows, j)}, "
            f"{experiment.arm_names[arm[i]]!r} at row {_row(rows, i)})"
        )
    del split
    longest = int(counts.max())
    narrow = counts.astype(np.uint8 if longest < 2**8 else np.int32)
    n_bidders = np.repeat(narrow, counts) if contiguous else narrow[auction]
    del narrow
    n_excluded = int(np.count_nonzero(counts == 1))
    del counts
    segment, segment_names = _segments(bids, experiment, auction, contiguous, rows, source)
    bidder, n_bidder_labels, bidder_ids = _bidder_labels(bids["bidder_id"])
    _refuse_repeated_bidders(auction, bidder, n_bidder_labels, bids, rows, source, contiguous=contiguous,
                             longest=longest)
    covariates = auction_covariates(bids, experiment.scale_covariates, auction, experiment_id=experiment.id,
                                    rows=rows, source=source)
    if covariates is not None and not low > 0:  # homogenising takes the log of every (effective) bid
        i = int(np.flatnonzero(~(bid > 0))[0])
        raise InputError(f"{source}: column 'bid' row {_row(rows, i)} is {float(bid[i])!r}; with scale_covariates "
                         "every (effective) bid must be > 0 (its log is taken)")
    n_excluded_bids = int(np.count_nonzero(n_bidders < 2)) if n_excluded else 0
    if n_excluded_bids:
        keep = n_bidders >= 2
        auction = pd.factorize(auction[keep], sort=False)[0]
        bid, bidder, arm, position, n_bidders = bid[keep], bidder[keep], arm[keep], position[keep], n_bidders[keep]
        segment = None if segment is None else segment[keep]
        covariates = None if covariates is None else covariates[keep]
    if bid.size == 0:
        raise no_pieces_error(source, experiment.id, single_bidders=True, n_excluded_auctions=n_excluded)
    return PreparedBids(
        bid=bid,
        auction=auction,
        bidder=bidder,
        arm=arm,
        position=position,
        n_bidders=n_bidders,
        n_auctions=int(auction.max()) + 1,
        n_excluded_auctions=n_excluded,
        n_excluded_bids=n_excluded_bids,
        has_quality=has_quality,
        bidder_ids=bidder_ids,
        segment=segment,
        segment_names=segment_names,
        covariates=covariates,
    )


#: Label of a null segment value: a segment of its own.
NULL_SEGMENT = "(null)"
#: Between the values of several segment columns in a segment's label.
SEGMENT_SEPARATOR = "|"


def segment_label(values) -> str:
    """The label of one segment: its columns' values as text (``true``/``false`` for booleans, :data:`NULL_SEGMENT`
    for a null), joined by :data:`SEGMENT_SEPARATOR`."""
    return SEGMENT_SEPARATOR.join(_segment_text(v) for v in values)


def _segment_text(v) -> str:
    if v is None or v is pd.NA or (isinstance(v, float) and math.isnan(v)):
        return NULL_SEGMENT
    if isinstance(v, (bool, np.bool_)):
        return "true" if v else "false"
    if isinstance(v, (float, np.floating)):
        return str(int(v))
    return str(v.item() if isinstance(v, np.generic) else v)


def _segment_column(col: pd.Series, name: str, rows: np.ndarray | None, source: str) -> tuple[np.ndarray, list[str]]:
    """Codes (null: a code of its own) and labels of one segment column; string, integer or boolean only."""
    kind = pd.api.types.infer_dtype(col, skipna=True)
    if isinstance(col.dtype, pd.CategoricalDtype):
        kind = pd.api.types.infer_dtype(col.cat.categories, skipna=True)
    if pd.api.types.is_float_dtype(col):  # pandas holds integers with nulls as floats
        values = col.to_numpy(dtype=float, na_value=np.nan)
        bad = np.flatnonzero(np.isfinite(values) & (values != np.round(values)) | np.isinf(values))
        if bad.size:
            raise InputError(f"{source}: segment column {name!r} row {_row(rows, int(bad[0]))} is "
                             f"{float(values[bad[0]])!r}; segment columns hold strings, integers or booleans")
        kind = "integer"
    if kind not in ("string", "integer", "boolean", "empty", "categorical"):
        raise InputError(f"{source}: segment column {name!r} must hold strings, integers or booleans "
                         f"(dtype {col.dtype}, values of kind {kind!r})")
    codes, uniques = pd.factorize(col, sort=False, use_na_sentinel=True)
    labels = [_segment_text(v) for v in uniques]
    if (codes < 0).any():
        codes = np.where(codes < 0, len(labels), codes)
        labels.append(NULL_SEGMENT)
    return codes, labels


def _segments(bids: pd.DataFrame, experiment: Experiment, auction: np.ndarray, contiguous: bool,
              rows: np.ndarray | None, source: str) -> tuple[np.ndarray | None, tuple[str, ...]]:
    """Per bid, the code of its segment (labels sorted); one error naming an auction whose bids disagree."""
    if not experiment.segments:
        return None, ()
    combined, labels = None, None
    for name in experiment.segments:
        if name not in bids.columns:
            raise InputError(f"{source}: segment column {name!r} of experiment {experiment.id!r} is missing")
        codes, names = _segment_column(bids[name], name, rows, source)
        check_constant_within_auctions(codes, auction, bids, rows, source=source, kind="segment", name=name,
                                       shown=lambda k: repr(names[codes[k]]))
        if combined is None:
            combined, labels = codes.astype(np.int64), names
        else:
            pair, uniques = pd.factorize(combined * len(names) + codes, sort=False)
            labels = [labels[int(u) // len(names)] + SEGMENT_SEPARATOR + names[int(u) % len(names)] for u in uniques]
            combined = pair.astype(np.int64)
    order = sorted(range(len(labels)), key=lambda k: labels[k])
    rank = np.empty(len(labels), dtype=np.int32)
    rank[order] = np.arange(len(labels), dtype=np.int32)
    return rank[combined], tuple(labels[k] for k in order)


#: The contract's rule for ``quality`` (kind ``numeric``, optional; where present every row > 0).
_QUALITY = BID_CONTRACT["quality"]


def _qualities(col: pd.Series, rows: np.ndarray | None, source: str) -> np.ndarray:
    """The ``quality`` column as float64; one error naming the first row that is null, NaN, infinite or <= 0."""
    if _holds_decimals(col):
        col = pd.Series(col.to_numpy(dtype=float, na_value=np.nan), index=col.index)
    if pd.api.types.is_bool_dtype(col) or not pd.api.types.is_numeric_dtype(col):
        coerced = pd.to_numeric(col, errors="coerce") if not pd.api.types.is_bool_dtype(col) else None
        bad = np.flatnonzero(coerced.isna().to_numpy() & col.notna().to_numpy()) if coerced is not None else np.r_[0]
        if bad.size:
            i = int(bad[0])
            raise InputError(f"{source}: column 'quality' must be numeric (dtype {col.dtype}); "
                             f"row {_row(rows, i)} holds {_value(col.iloc[i])}")
        col = coerced  # numbers held as objects, with nulls
    quality = col.to_numpy(dtype=float, na_value=np.nan)
    if not (quality.min() > 0 and quality.max() < np.inf):  # False for NaN too
        for test, what in ((np.isnan, "missing (null or NaN)"), (np.isinf, "infinite"), (lambda a: a <= 0, "not positive")):
            bad = np.flatnonzero(test(quality))
            if bad.size:
                raise InputError(f"{source}: column 'quality' row {_row(rows, int(bad[0]))} is {what} "
                                 f"({quality[bad[0]]!r}); quality factors must be > 0 wherever the column exists")
    return quality


def _refuse_bids_above_max(bid: np.ndarray, experiment: Experiment, rows: np.ndarray | None, source: str) -> None:
    """A logged bid above the spec's ``max_bid`` cannot have been placed: refuse, naming the first such row."""
    above = np.flatnonzero(bid > experiment.max_bid)
    i = int(above[0])
    more = f" ({above.size} bids above it)" if above.size > 1 else ""
    raise InputError(f"{source}: column 'bid' row {_row(rows, i)} is {float(bid[i])!r}, above max_bid "
                     f"{experiment.max_bid!r} of experiment {experiment.id!r}{more}")


def _refuse_bids_against_floor(bid: np.ndarray, position: np.ndarray, floor: float, rows: np.ndarray | None,
                               source: str, *, has_quality: bool) -> None:
    """A sub-floor bid must be unshown (null position).

    Bids that all lie below the floor are no fault of one input: a shard or stratum of a day may hold
    no eligible bid by chance (its revenue is 0, :mod:`.pieces`); only a day with none at all is
    refused, where its pieces are combined (:func:`~.combine.combine_pieces`).
    """
    what = "effective bid (bid x quality)" if has_quality else "bid"
    shown = np.flatnonzero((bid < floor) & (position > 0))
    if shown.size:
        i = int(shown[0])
        if not bid.max() >= floor:  # shown bids, none eligible: most likely a floor the spec states wrongly
            raise InputError(f"{source}: the floor {floor!r} lies above every {what} (largest {float(bid.max())!r}), "
                             f"yet row {_row(rows, i)} has position {int(position[i])}; is the spec's floor right? "
                             "(sub-floor bids are logged with a null position)")
        raise InputError(f"{source}: row {_row(rows, i)} has {what} {float(bid[i])!r} below the floor {floor!r} but "
                         f"position {int(position[i])}; sub-floor bids are logged with a null position")


#: The contract's rule for ``position`` (kind ``integer``, nullable: null = not shown). pandas holds
#: an integer column with nulls as a float one, so whole floats are read as integers here; the
#: reader refuses a Parquet ``position`` of a floating-point or decimal type before this point.
_POSITION = BID_CONTRACT["position"]


def _positions(pos_col: pd.Series, rows: np.ndarray | None, source: str) -> np.ndarray:
    """Positions as a small integer array, 0 where the bid was not shown (null); 1 = top."""
    if pos_col.isna().all():
        return np.zeros(len(pos_col), dtype=np.int32)
    if pd.api.types.is_bool_dtype(pos_col) or not pd.api.types.is_numeric_dtype(pos_col):
        raise InputError(f"{source}: column 'position' must be an integer (1 = top) or null; dtype is {pos_col.dtype}")
    if pd.api.types.is_integer_dtype(pos_col) and int(pos_col.max()) < 2**31:  # whole numbers: no rounding test
        shown = None if _is_plain_integer(pos_col) else pos_col.notna().to_numpy()
        dtype = pos_col.dtype if _is_plain_integer(pos_col) else pos_col.dtype.numpy_dtype
        position = pos_col.to_numpy(dtype=dtype if np.dtype(dtype).itemsize <= 4 else np.int32, na_value=0)
        first = _POSITION.lower_bound
        bad = np.flatnonzero(position < first) if shown is None else np.flatnonzero((position < first) & shown)
        if bad.size:
            raise InputError(
                f"{source}: column 'position' row {_row(rows, int(bad[0]))} is {float(position[bad[0]])!r}; "
                "positions are integers >= 1 (null = not shown)"
            )
        return position
    pos = pos_col.to_numpy(dtype=float, na_value=np.nan)
    shown = ~np.isnan(pos)
    bad = np.flatnonzero(shown & ((pos < 1) | (pos != np.round(pos)) | (pos >= 2**31)))
    if bad.size:
        raise InputError(
            f"{source}: column 'position' row {_row(rows, int(bad[0]))} is {pos[bad[0]]!r}; "
            "positions are integers >= 1 (null = not shown)"
        )
    return np.where(shown, pos, 0).astype(np.int32)


def sort_order(bids: np.ndarray) -> np.ndarray:
    """The stable ascending order of non-negative, finite ``bids`` (same as ``argsort(kind="stable")``)."""
    return sorted_with_order(bids)[0]


def sorted_with_order(bids: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The stable ascending order of non-negative, finite ``bids`` and the bids in that order.

    ``np.argsort`` of float64 is many times slower than ``np.sort``, so large inputs take a
    detour that is exact by construction. Non-negative IEEE-754 doubles order like their bit
    patterns read as unsigned 64-bit integers. One ``np.sort`` of a packed key -- the bid's bits
    with the lowest ``k`` cleared, the row index (k bits) in their place -- orders the rows by bid
    and breaks ties by row index, except among bids that agree in all but their lowest ``k`` bits
    (relative differences below ~2**(k-52)), which it orders by row index alone. Only groups of
    such near-ties that came out in descending bid order are re-sorted (by bid, then row index).
    The result equals the stable argsort: equal bids keep their row order.

    Returns
    -------
    order : ndarray of intp
    sorted_bids : ndarray of float64
    """
    n = bids.size
    if n < 2**16:
        order = np.argsort(bids, kind="stable")
        return order, bids[order]
    k = np.uint64(int(n - 1).bit_length())
    key = np.add(bids, 0.0).view(np.uint64)  # + 0.0 turns -0.0 (sign bit set) into +0.0
    key >>= k
    key <<= k
    for lo in range(0, n, 2**20):  # the row index into the low bits, without an N-long temporary
        key[lo:lo + 2**20] |= np.arange(lo, min(n, lo + 2**20), dtype=np.uint64)
    key.sort()
    key &= np.uint64((1 << int(k)) - 1)
    order = key.view(np.intp)  # the row indices, in place
    sorted_bids = bids[order]
    down = np.flatnonzero(sorted_bids[1:] < sorted_bids[:-1])
    if down.size:
        # A group shares the high bits: its bids lie in [low, high], the doubles with those bits.
        # Groups come in ascending order, so "bid < low" and "bid <= high" are monotone along
        # the array and a binary search finds each group's extent.
        groups = np.unique(np.add(sorted_bids[down], 0.0).view(np.uint64) >> k)
        low = (groups << k).view(np.float64)
        high = (((groups + np.uint64(1)) << k) - np.uint64(1)).view(np.float64)
        starts = np.searchsorted(sorted_bids, low, side="left")
        lengths = np.searchsorted(sorted_bids, high, side="right") - starts
        offsets = np.cumsum(lengths) - lengths
        pos = np.arange(int(lengths.sum())) + np.repeat(starts - offsets, lengths)
        fix = np.lexsort((order[pos], sorted_bids[pos], np.repeat(np.arange(groups.size), lengths)))
        order[pos] = order[pos][fix]
        sorted_bids[pos] = sorted_bids[pos][fix]
    return order, sorted_bids
