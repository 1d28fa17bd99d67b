"""Thresholds of the data checks: the defaults and their validation (one home, read by the spec and the checks).

:mod:`.spec` validates an experiment's ``checks:`` section with :func:`check_config` when it is
loaded; :mod:`.checks` reads the merged thresholds. Neither imports the other.
"""

from __future__ import annotations

import copy
import math
from collections.abc import Mapping, Sequence
from typing import Any

from .days import parse_day
from .errors import InputError

__all__ = ["DEFAULT_CHECKS", "SEVERITIES", "check_config"]

#: Severities, mildest first.
SEVERITIES = ("warning", "error")

#: Default severity and thresholds of every check, keyed by check group. The spec's ``checks:``
#: section overrides any key, e.g. ``checks: {sample_ratio: {alpha: 1.0e-4}, drift: {severity:
#: error}}``. ``contract`` configures the Great Expectations suite in ``counterbid.operators``.
DEFAULT_CHECKS: Mapping[str, Mapping[str, Any]] = {
    # Auctions per arm vs designed shares, Pearson chi-square; fail when p < alpha.
    "sample_ratio": {"severity": "error", "alpha": 1e-3},
    # Auctions per arm, and per number of bidders (strata smaller than this are not estimated well).
    "min_auctions_per_arm": {"severity": "error", "min_auctions": 100},
    "min_auctions_per_stratum": {"severity": "warning", "min_auctions": 50},
    # v(q) = b + b' x / x' on a least-squares cubic spline of the bid quantile function (per stratum):
    # fail when v lies below its running maximum by more than `tolerance` x (its range) on more
    # than `max_falling_share` of the grid on [q_low, q_high].
    "monotone_values": {
        "severity": "warning",
        "max_falling_share": 0.05,
        "tolerance": 0.03,
        "knots": 16,
        "grid": 200,
        "q_low": 0.05,
        "q_high": 0.95,
        "min_bids": 1000,
    },
    # Implied value / bid on the same grid: fail when more than `max_outside_share` of it lies
    # outside [min_ratio, max_ratio] (a value below the bid cannot be a best response).
    "shading": {"severity": "warning", "min_ratio": 1.0, "max_ratio": 50.0, "max_outside_share": 0.05},
    # Two-sample Kolmogorov-Smirnov, today's bids vs the trailing days' (per stratum, Bonferroni).
    "drift": {"severity": "warning", "alpha": 1e-3, "trailing_days": 7, "min_bids": 200},
    # Bids of one auction must be independent draws: the intra-auction correlation of normal scores
    # of within-stratum bid ranks (estimators/dependence.py). Fail when its one-sided p < alpha and it
    # exceeds min_correlation (implied revenue bias under 1 %); above error_correlation (2-5 % on
    # a small arm) the failure is an error whatever `severity` says (docs/method.md, "Auctions that differ").
    "auction_dependence": {"severity": "warning", "alpha": 1e-3, "min_correlation": 0.02, "error_correlation": 0.1},
    # Days since the experiment started or its shares changed; flagged while < days.
    "warmup": {"severity": "warning", "days": 3, "changed_on": []},
    # Bids whose log lies more than `max_robust_z` robust sds (1.4826 MAD) above their stratum's median
    # log bid (estimators/outlying_bids.py); the first `max_rows` are named.
    "outlying_bids": {"severity": "warning", "max_robust_z": 8.0, "min_bids": 20, "max_rows": 10},
    # Share of some arm's revenue estimate the outlying bids carry; fail above `max_share`.
    "dominant_bids": {"severity": "error", "max_share": 0.5},
    # Great Expectations contract suite (counterbid.operators.contract).
    "contract": {"severity": "error", "max_bidders": 200, "min_bidders": 2, "tie_tolerance": 1e-9, "sample_rows": 1000},
}


def check_config(*layers: Mapping[str, Any] | None, source: str = "checks") -> dict[str, dict[str, Any]]:
    """Merge threshold overrides onto :data:`DEFAULT_CHECKS` and validate them.

    Parameters
    ----------
    *layers : mapping or None
        Override mappings ``{group: {key: value}}``, applied in order (later wins): typically
        the experiment's ``checks:`` section, then an operator's ``config``.
    source : str
        Name of the configuration in error messages.

    Returns
    -------
    dict
        A full copy of the defaults with the overrides applied.

    Raises
    ------
    InputError
        Unknown group or key, a severity other than ``warning``/``error``, or a value of the
        wrong type; the message names ``group.key``.
    """
    merged = copy.deepcopy({k: dict(v) for k, v in DEFAULT_CHECKS.items()})
    for layer in layers:
        if layer is None:
            continue
        if not isinstance(layer, Mapping):
            raise InputError(f"{source}: must be a mapping of check name to settings")
        for group, settings in layer.items():
            if group not in merged:
                raise InputError(f"{source}: unknown check {group!r} (known: {', '.join(merged)})")
            if not isinstance(settings, Mapping):
                raise InputError(f"{source}.{group}: must be a mapping of setting to value")
            for key, value in settings.items():
                if key not in merged[group]:
                    raise InputError(
                        f"{source}.{group}: unknown setting {key!r} (known: {', '.join(merged[group])})"
                    )
                merged[group][key] = _setting(value, merged[group][key], f"{source}.{group}.{key}", key)
    return merged


def _setting(value: Any, default: Any, where: str, key: str) -> Any:
    if key == "severity":
        if value not in SEVERITIES:
            raise InputError(f"{where}: must be one of {', '.join(SEVERITIES)}; got {value!r}")
        return value
    if key == "changed_on":
        if isinstance(value, (str, bytes)) or not isinstance(value, Sequence):
            raise InputError(f"{where}: must be a list of dates YYYY-MM-DD; got {value!r}")
        return [parse_day(v, what=where) for v in value]
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise InputError(f"{where}: must be a finite number; got {value!r}")
    if isinstance(default, int) and not isinstance(default, bool):
        if int(value) != value or value < 0:
            raise InputError(f"{where}: must be a whole number >= 0; got {value!r}")
        return int(value)
    if value < 0:
        raise InputError(f"{where}: must be >= 0; got {value!r}")
    return float(value)
