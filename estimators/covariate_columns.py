"""The spec's ``scale_covariates`` columns of a bid log, validated: numeric, finite, constant within an auction.

:func:`auction_covariates` is called by :func:`~counterbid.estimators.prepare_bids`; every fault is
one line naming the column and the row (or the auction and its two rows).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np
import pandas as pd

from .errors import InputError

__all__ = ["auction_covariates", "check_constant_within_auctions"]


def _row(rows: np.ndarray | None, i: int) -> int:
    """Row ``i`` of the validated frame as a row of the caller's frame (``None``: the same)."""
    return int(i if rows is None else rows[i])


def _value(x) -> str:
    """A cell value as it reads in an error line (numpy scalars unwrapped)."""
    return repr(x.item() if isinstance(x, np.generic) else x)


def check_constant_within_auctions(values: np.ndarray, auction: np.ndarray, bids: pd.DataFrame,
                                   rows: np.ndarray | None, *, source: str, kind: str, name: str,
                                   shown: Callable[[int], str]) -> None:
    """Refuse an auction-level column whose value changes within an auction, in one line.

    The line names the first row whose value differs from its auction's first row, that auction,
    both rows and both values (``shown(k)``: the value of row ``k`` as it reads); ``kind`` is what
    the column is ("segment", "scale covariate").
    """
    first = np.empty(int(auction.max()) + 1, dtype=values.dtype)
    first[auction[::-1]] = values[::-1]  # the first row of each auction
    split = np.flatnonzero(first[auction] != values)
    if split.size:
        i = int(split[0])
        j = int(np.flatnonzero(auction == auction[i])[0])
        raise InputError(
            f"{source}: auction {_value(bids['auction_id'].iloc[i])} has two values of {kind} column {name!r} "
            f"({shown(j)} at row {_row(rows, j)}, {shown(i)} at row {_row(rows, i)}); "
            f"a {kind} must be constant within an auction")


def _column(col: pd.Series, name: str, rows: np.ndarray | None, source: str) -> np.ndarray:
    """One covariate column as float64; refuses non-numbers, nulls and infinities naming the first row."""
    what = f"{source}: scale covariate column {name!r}"
    if pd.api.types.is_bool_dtype(col):
        raise InputError(f"{what} must be numeric, not boolean (dtype {col.dtype})")
    if not pd.api.types.is_numeric_dtype(col):
        coerced = pd.to_numeric(col, errors="coerce")
        bad = np.flatnonzero(coerced.isna().to_numpy() & col.notna().to_numpy())
        if bad.size:
            i = int(bad[0])
            raise InputError(f"{what} must be numeric (dtype {col.dtype}); row {_row(rows, i)} holds {_value(col.iloc[i])}")
        col = coerced
    x = col.to_numpy(dtype=float, na_value=np.nan)
    if x.size and not (np.isfinite(x.min()) and np.isfinite(x.max())):
        for test, kind in ((np.isnan, "null or NaN"), (np.isinf, "infinite")):
            bad = np.flatnonzero(test(x))
            if bad.size:
                raise InputError(f"{what} row {_row(rows, int(bad[0]))} is {kind} ({float(x[bad[0]])!r}); "
                                 "scale covariates must be finite numbers")
    return x


def auction_covariates(bids: pd.DataFrame, names: Sequence[str], auction: np.ndarray, *, experiment_id: str,
                       rows: np.ndarray | None = None, source: str = "bids") -> np.ndarray | None:
    """The covariates of every bid, ``N x p`` float64 (``None`` when ``names`` is empty).

    Parameters
    ----------
    bids : pandas.DataFrame
        The experiment's rows of the bid log.
    names : sequence of str
        The spec's ``scale_covariates``.
    auction : ndarray of int
        Auction code of each row (0..A-1).
    experiment_id : str
    rows : ndarray, optional
        Row of the caller's frame of each row of ``bids`` (for the error lines; ``None``: the same).
    source : str

    Raises
    ------
    InputError
        A missing column, a non-numeric, null or infinite value, or an auction whose rows disagree.
    """
    if not names:
        return None
    out = np.empty((len(bids), len(names)))
    for k, name in enumerate(names):
        if name not in bids.columns:
            raise InputError(f"{source}: scale covariate column {name!r} of experiment {experiment_id!r} is missing")
        x = _column(bids[name], name, rows, source)
        check_constant_within_auctions(x, auction, bids, rows, source=source, kind="scale covariate", name=name,
                                       shown=lambda k: repr(float(x[k])))
        out[:, k] = x
    return out
