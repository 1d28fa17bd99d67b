"""Position weights measured from a click log: weighted isotonic regression of click rates.

Pure (numpy, scipy, pandas): the pipeline pools the click log with SQL and passes the pooled
counts here.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.optimize import isotonic_regression

from .errors import InputError
from .spec import Experiment

__all__ = ["CLICK_COLUMNS", "MEASURED_WEIGHT_COLUMNS", "measured_position_weights"]

#: Columns the pooled click counts must have (one row per arm and position).
CLICK_COLUMNS = ("arm", "position", "impressions", "clicks")
#: Columns of the result of :func:`measured_position_weights`.
MEASURED_WEIGHT_COLUMNS = ("arm", "position", "weight", "impressions", "clicks")


def measured_position_weights(clicks: pd.DataFrame, experiment: Experiment, *, source: str = "click log") -> pd.DataFrame:
    """Position weights of the experiment's ``measured`` arms from pooled clicks and impressions.

    For each arm whose spec says ``position_weights: measured``, the click rates
    ``clicks / impressions`` of positions ``1, 2, ...`` are fitted by a non-increasing sequence
    by weighted isotonic regression (least squares, impressions as weights), since the estimator
    needs ``w_1 >= w_2 >= ... >= 0``. Positions from the first one never shown (no row, or no
    impressions) onward are dropped: a weight past a gap is not measured.

    Parameters
    ----------
    clicks : pandas.DataFrame
        One row per (arm, position) with columns ``arm``, ``position`` (integer >= 1),
        ``impressions`` and ``clicks`` (whole numbers, ``0 <= clicks <= impressions``), pooled
        over the measurement window. Other columns and other arms' rows are ignored.
    experiment : Experiment
        The spec's experiment; its arms with ``measured`` true are fitted.
    source : str, optional
        Name of the click data in error messages (a path).

    Returns
    -------
    pandas.DataFrame
        Columns ``arm, position, weight, impressions, clicks``: for each measured arm (in spec
        order) its positions ``1..K`` with the fitted weight and the pooled counts. Empty when
        no arm is measured.

    Raises
    ------
    InputError
        A column is missing; a value is null, not a whole number, negative, or ``clicks >
        impressions``; an (arm, position) appears twice; or a measured arm has no clicks at
        position 1 onward. The message names ``source``, the column and the row or the arm.

    Notes
    -----
    The fit is ``scipy.optimize.isotonic_regression(clicks / impressions, weights=impressions,
    increasing=False)``, the pool-adjacent-violators solution of [1]_: adjacent positions
    whose rates rise are pooled to their combined rate (total clicks over total impressions).

    References
    ----------
    .. [1] Barlow, R. E., Bartholomew, D. J., Bremner, J. M., Brunk, H. D. (1972). Statistical
       Inference under Order Restrictions. Wiley.
    """
    if not isinstance(clicks, pd.DataFrame):
        raise InputError(f"{source}: pooled clicks must be a DataFrame; got {type(clicks).__name__}")
    missing = [c for c in CLICK_COLUMNS if c not in clicks.columns]
    if missing:
        raise InputError(f"{source}: column {missing[0]!r} is missing (need {', '.join(CLICK_COLUMNS)})")
    measured = [a.name for a in experiment.arms if a.measured]
    rows = clicks.loc[clicks["arm"].astype("string").isin(measured).fillna(False).to_numpy(bool), list(CLICK_COLUMNS)]
    counts = {c: _whole_numbers(rows[c], c, source) for c in ("position", "impressions", "clicks")}
    arms = rows["arm"].astype(str).to_numpy()
    if (counts["position"] < 1).any():
        raise InputError(f"{source}: column 'position' row {_row(rows, counts['position'] < 1)} is below 1")
    over = counts["clicks"] > counts["impressions"]
    if over.any():
        raise InputError(f"{source}: row {_row(rows, over)} has more clicks than impressions")
    keys = pd.DataFrame({"arm": arms, "position": counts["position"]})
    dup = keys.duplicated().to_numpy()
    if dup.any():
        raise InputError(f"{source}: arm {arms[dup][0]!r} position {int(counts['position'][dup][0])} appears twice")
    frames = []
    for name in measured:
        mine = arms == name
        order = np.argsort(counts["position"][mine], kind="stable")
        position = counts["position"][mine][order]
        impressions = counts["impressions"][mine][order]
        n_clicks = counts["clicks"][mine][order]
        shown = impressions > 0
        position, impressions, n_clicks = position[shown], impressions[shown], n_clicks[shown]
        # keep 1..K: stop at the first position missing from the sequence
        gap = np.flatnonzero(position != np.arange(1, position.size + 1))
        keep = position.size if gap.size == 0 else int(gap[0])
        position, impressions, n_clicks = position[:keep], impressions[:keep], n_clicks[:keep]
        if n_clicks.sum() <= 0:
            raise InputError(f"{source}: no clicks for experiment {experiment.id!r} arm {name!r} in the window")
        rate = n_clicks / impressions
        fitted = isotonic_regression(rate, weights=impressions.astype(float), increasing=False).x
        frames.append(pd.DataFrame({"arm": name, "position": position.astype("int64"), "weight": fitted,
                                    "impressions": impressions.astype("int64"), "clicks": n_clicks.astype("int64")}))
    if not frames:
        return pd.DataFrame({"arm": pd.Series(dtype=object), "position": pd.Series(dtype="int64"),
                             "weight": pd.Series(dtype=float), "impressions": pd.Series(dtype="int64"),
                             "clicks": pd.Series(dtype="int64")})
    return pd.concat(frames, ignore_index=True)


def _whole_numbers(column: pd.Series, name: str, source: str) -> np.ndarray:
    """A count column as int64, refusing nulls, fractions and negative values (the row is named)."""
    values = pd.to_numeric(column, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    bad = ~np.isfinite(values)
    if bad.any():
        raise InputError(f"{source}: column {name!r} row {_row(column, bad)} is null or not a number")
    bad = (values != np.round(values)) | (values < 0)
    if bad.any():
        raise InputError(f"{source}: column {name!r} row {_row(column, bad)} must be a whole number >= 0")
    return values.astype("int64")


def _row(frame, mask: np.ndarray):
    """Index label of the first row where ``mask`` holds."""
    return frame.index[int(np.flatnonzero(mask)[0])]
