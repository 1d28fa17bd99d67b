"""What an interval of :func:`~counterbid.estimators.estimate_arms` speaks for: its level and clustering.

The CLI, the results tables and the report all print these the same way, from what the run used
(:class:`~.combine.ArmEstimates`' ``confidence_level`` and ``cluster``), never from a default.
"""

from __future__ import annotations

from decimal import Decimal

import numpy as np
import pandas as pd

from .errors import InputError

__all__ = ["AUCTION_CLUSTERED_METRICS", "POPULATION", "format_level", "interval_label", "row_clusters"]

#: Metrics whose intervals are clustered by auction whatever the run's clustering: realized revenue
#: belongs to an auction (see ``estimate_arms``, Notes).
AUCTION_CLUSTERED_METRICS = ("realized_revenue_per_auction",)
#: The population an interval speaks for, by the unit its standard errors were clustered on.
POPULATION = {
    "bidder": "a new draw of bidders as well as of auctions",
    "auction": "these same bidders in new auctions",
}


def format_level(level: float) -> str:
    """A confidence level as an exact percentage: ``0.975`` -> ``'97.5 %'``, ``0.95`` -> ``'95 %'``.

    Parameters
    ----------
    level : float
        In (0, 1).

    Returns
    -------
    str
        The shortest decimal of ``level`` times 100 (no rounding to whole percent), then ``' %'``.
    """
    if isinstance(level, bool) or not isinstance(level, (int, float, np.floating)) or not 0 < float(level) < 1:
        raise InputError(f"confidence level must be a number in (0, 1); got {level!r}")
    # repr gives the shortest decimal that round-trips; Decimal scales it without binary error.
    percent = Decimal(repr(float(level))) * 100
    return f"{percent.normalize():f} %"


def interval_label(level: float, cluster: str) -> str:
    """``'97.5 %, clustered by bidder'``: how one interval was computed."""
    if cluster not in POPULATION:
        raise InputError(f"cluster must be one of {', '.join(POPULATION)}; got {cluster!r}")
    return f"{format_level(level)}, clustered by {cluster}"


def row_clusters(metrics: pd.Series, cluster: str) -> pd.Series:
    """The clustering each row's interval used.

    Parameters
    ----------
    metrics : pandas.Series of str
        The rows' ``metric`` column (of :class:`~.combine.ArmEstimates`' table).
    cluster : {'auction', 'bidder'}
        The clustering the run used (``ArmEstimates.cluster``).

    Returns
    -------
    pandas.Series of str
        ``cluster`` on every row, except the realized per-arm averages (always ``'auction'``);
        indexed like ``metrics``.
    """
    if cluster not in POPULATION:
        raise InputError(f"estimate: cluster must be one of {', '.join(POPULATION)}; got {cluster!r}")
    by_auction = metrics.isin(AUCTION_CLUSTERED_METRICS).to_numpy()
    return pd.Series(np.where(by_auction, "auction", cluster), index=metrics.index, name="cluster")
