"""Columns every stored estimate row carries besides the estimate: status, level, clustering, rule and floor.

``status`` is ``'ok'`` or the sorted, comma-joined flags of the row: ``warning`` when a data check
of severity warning failed for the (experiment, day), the flag :data:`CHECK_FLAGS` gives a failed
check that has one of its own (``heterogeneous_auctions``: the bids of one auction move together,
``auction_dependence``), plus the estimator's own flags from its
``status`` column (``few_bids``, ``degenerate``, ``no_interval``, ...; a table without the
column counts as ``ok``). ``confidence_level`` and ``cluster`` are what the run used
(``estimate_arms``' :class:`~counterbid.estimators.ArmEstimates`; the realized per-arm averages are
always clustered by auction), and so
are ``payment_rule`` and ``floor``: the auction the bids came from. Experiment-to-date rows also
carry anytime-valid bounds (``with_anytime_columns``).
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd

from counterbid.estimators import ArmEstimates
from counterbid.estimators.errors import InputError
from counterbid.estimators.intervals import row_clusters
from counterbid.estimators.payment_rules import PAYMENT_RULES
from counterbid.estimators.sequential import anytime_bounds

__all__ = ["ANYTIME_METRICS", "CHECK_FLAGS", "CHECK_STATUS_FLAG", "STATUS_PATTERN", "check_flags", "stored_status",
           "with_anytime_columns", "with_stored_columns"]

#: Flag added to every row of an (experiment, day) whose data checks raised a warning.
CHECK_STATUS_FLAG = "warning"
#: Checks whose failure adds a flag of its own to every row of the (experiment, day).
CHECK_FLAGS = {"auction_dependence": "heterogeneous_auctions"}
#: Shape of a stored status (also the results tables' check constraint): ``ok`` or flags.
STATUS_PATTERN = r"[a-z][a-z_]*(,[a-z][a-z_]*)*"
_STATUS = re.compile(STATUS_PATTERN)
#: To-date metrics that get anytime-valid bounds (welfare has no interval, so none).
ANYTIME_METRICS = ("revenue_per_auction", "realized_revenue_per_auction", "revenue_lift_vs_control")


def check_flags(failed_checks) -> tuple[str, ...]:
    """The row flags of the failed checks that have one (:data:`CHECK_FLAGS`), sorted."""
    return tuple(sorted({CHECK_FLAGS[c] for c in failed_checks if c in CHECK_FLAGS}))


def stored_status(check_status: str, estimator_status: object = "ok", *, flags=()) -> str:
    """Merge the data-check outcome and the estimator's row status into the stored status.

    Parameters
    ----------
    check_status : {'ok', 'warning'}
        What the validate step recorded for the (experiment, day).
    estimator_status : str, optional
        The row's ``status`` from ``estimate_arms``: ``'ok'`` or comma-joined flags.
    flags : iterable of str, optional
        Flags of the day's failed checks (:func:`check_flags`).

    Returns
    -------
    str
        ``'ok'``, or the sorted, de-duplicated flags joined by commas.
    """
    if check_status not in ("ok", CHECK_STATUS_FLAG):
        raise InputError(f"check status must be 'ok' or {CHECK_STATUS_FLAG!r}; got {check_status!r}")
    text = "ok" if estimator_status is None or (isinstance(estimator_status, float) and pd.isna(estimator_status)) \
        else str(estimator_status)
    if not _STATUS.fullmatch(text.replace(" ", "")):
        raise InputError(f"estimator status must be 'ok' or comma-joined flags; got {estimator_status!r}")
    own = {f for f in text.replace(" ", "").split(",") if f != "ok"}
    extra = set(flags)
    bad = sorted(f for f in extra if not _STATUS.fullmatch(f))
    if bad:
        raise InputError(f"check flags must be lowercase words; got {bad[0]!r}")
    if check_status == CHECK_STATUS_FLAG:
        extra.add(CHECK_STATUS_FLAG)
    return ",".join(sorted(own | extra)) or "ok"


def with_stored_columns(table: pd.DataFrame, result: ArmEstimates, *, check_status: str, flags=()) -> pd.DataFrame:
    """``table`` (rows of ``result``, possibly with more columns) with ``status``, ``confidence_level``,
    ``cluster``, ``payment_rule`` and ``floor`` (0: none) set.

    Parameters
    ----------
    table : pandas.DataFrame
        Rows of ``result`` (``result.to_frame()``, say); modified in place and returned.
    result : ArmEstimates
        What the rows were computed with: level, clustering, payment rule and floor.
    check_status : {'ok', 'warning'}
    flags : iterable of str, optional
        Flags of the day's failed checks (:func:`check_flags`), added to every row.

    Returns
    -------
    pandas.DataFrame
    """
    level = result.confidence_level
    if isinstance(level, bool) or not isinstance(level, (int, float)) or not 0 < level < 1:
        raise InputError(f"estimate: confidence_level must be in (0, 1); got {level!r}")
    own = table["status"] if "status" in table.columns else pd.Series("ok", index=table.index)
    flags = tuple(flags)
    table["status"] = [stored_status(check_status, s, flags=flags) for s in own]
    table["confidence_level"] = float(level)
    table["cluster"] = row_clusters(table["metric"], result.cluster)
    if result.payment_rule not in PAYMENT_RULES:
        raise InputError(f"estimate: payment_rule must be one of {', '.join(PAYMENT_RULES)}; "
                         f"got {result.payment_rule!r}")
    table["payment_rule"] = result.payment_rule
    table["floor"] = float(result.floor or 0.0)
    return table


def with_anytime_columns(table: pd.DataFrame, result: ArmEstimates, *, horizon_auctions: int) -> pd.DataFrame:
    """Experiment-to-date rows with ``anytime_low``, ``anytime_high`` and ``anytime_horizon_auctions``.

    Parameters
    ----------
    table : pandas.DataFrame
        Rows of ``result`` (``result.to_frame()``), modified in place and returned.
    result : ArmEstimates
        A combination of the days to date (``combine_pieces``): its level and its auctions to date.
    horizon_auctions : int
        Auctions at the planned last look (planned days x the mean auctions per day used so far).

    Returns
    -------
    pandas.DataFrame
        Bounds on the revenue, realized revenue and lift rows (:data:`ANYTIME_METRICS`), NaN elsewhere
        and where the row has no standard error; every look uses the information ratio auctions to
        date over ``horizon_auctions`` (:func:`counterbid.estimators.sequential.anytime_bounds`).
    """
    level = result.confidence_level
    units = result.n_auctions
    if isinstance(horizon_auctions, bool) or not isinstance(horizon_auctions, (int, np.integer)) or horizon_auctions < 1:
        raise InputError(f"`horizon_auctions` must be a whole number >= 1; got {horizon_auctions!r}")
    if isinstance(units, bool) or not isinstance(units, (int, np.integer)) or units < 1:
        raise InputError(f"to-date estimate: n_auctions must be a whole number >= 1; got {units!r}")
    bounds = anytime_bounds(table["estimate"].to_numpy(float), table["std_error"].to_numpy(float), units=int(units),
                            planned_units=int(horizon_auctions), confidence_level=level)
    shown = table["metric"].isin(ANYTIME_METRICS).to_numpy()
    table["anytime_low"] = np.where(shown, bounds.low, np.nan)
    table["anytime_high"] = np.where(shown, bounds.high, np.nan)
    table["anytime_horizon_auctions"] = np.int64(horizon_auctions)
    return table
