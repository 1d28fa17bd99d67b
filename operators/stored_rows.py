"""Columns every stored estimate row carries besides the estimate: status, level, clustering, rule and floor.

``status`` is ``'ok'`` or the sorted, comma-joined flags of the row: ``warning`` when a data check
of severity warning failed for the (experiment, day), plus the estimator's own flags from its
``status`` column (``few_bids``, ``degenerate``, ``no_interval``, ...; a table without the
column counts as ``ok``). ``confidence_level`` and ``cluster`` are what the run used
(``estimate_arms``' :class:`~counterbid.estimators.ArmEstimates`; the realized per-arm averages are
always clustered by auction), and so
are ``payment_rule`` and ``floor``: the auction the bids came from.
"""

from __future__ import annotations

import re

import pandas as pd

from counterbid.estimators import ArmEstimates
from counterbid.estimators.errors import InputError
from counterbid.estimators.intervals import row_clusters
from counterbid.estimators.payment_rules import PAYMENT_RULES

__all__ = ["CHECK_STATUS_FLAG", "STATUS_PATTERN", "stored_status", "with_stored_columns"]

#: Flag added to every row of an (experiment, day) whose data checks raised a warning.
CHECK_STATUS_FLAG = "warning"
#: Shape of a stored status (also the results tables' check constraint): ``ok`` or flags.
STATUS_PATTERN = r"[a-z][a-z_]*(,[a-z][a-z_]*)*"
_STATUS = re.compile(STATUS_PATTERN)


def stored_status(check_status: str, estimator_status: object = "ok") -> str:
    """Merge the data-check outcome and the estimator's row status into the stored status.

    Parameters
    ----------
    check_status : {'ok', 'warning'}
        What the validate step recorded for the (experiment, day).
    estimator_status : str, optional
        The row's ``status`` from ``estimate_arms``: ``'ok'`` or comma-joined flags.

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
    flags = {f for f in text.replace(" ", "").split(",") if f != "ok"}
    if check_status == CHECK_STATUS_FLAG:
        flags.add(CHECK_STATUS_FLAG)
    return ",".join(sorted(flags)) or "ok"


def with_stored_columns(table: pd.DataFrame, result: ArmEstimates, *, check_status: str) -> pd.DataFrame:
    """``table`` (rows of ``result``, possibly with more columns) with ``status``, ``confidence_level``,
    ``cluster``, ``payment_rule`` and ``floor`` (0: none) set.

    Parameters
    ----------
    table : pandas.DataFrame
        Rows of ``result`` (``result.to_frame()``, say); modified in place and returned.
    result : ArmEstimates
        What the rows were computed with: level, clustering, payment rule and floor.
    check_status : {'ok', 'warning'}

    Returns
    -------
    pandas.DataFrame
    """
    level = result.confidence_level
    if isinstance(level, bool) or not isinstance(level, (int, float)) or not 0 < level < 1:
        raise InputError(f"estimate: confidence_level must be in (0, 1); got {level!r}")
    own = table["status"] if "status" in table.columns else pd.Series("ok", index=table.index)
    table["status"] = [stored_status(check_status, s) for s in own]
    table["confidence_level"] = float(level)
    table["cluster"] = row_clusters(table["metric"], result.cluster)
    if result.payment_rule not in PAYMENT_RULES:
        raise InputError(f"estimate: payment_rule must be one of {', '.join(PAYMENT_RULES)}; "
                         f"got {result.payment_rule!r}")
    table["payment_rule"] = result.payment_rule
    table["floor"] = float(result.floor or 0.0)
    return table
