"""Argument checks shared by the public functions of :mod:`counterbid.estimators` (one line each).

Each check raises :class:`~.errors.InputError` naming the argument and the value it got, and
returns the value in the type the caller goes on with.
"""

from __future__ import annotations

import math

import numpy as np

from .constants import CLUSTERS
from .errors import InputError
from .payment_rules import PAYMENT_RULES
from .spec import Experiment

__all__ = ["check_cluster", "check_confidence_level", "check_count", "check_experiment", "check_experiment_rule",
           "check_positive"]


def check_confidence_level(level: object) -> float:
    """A two-sided confidence level in (0, 1), as a float (``bool`` refused)."""
    if isinstance(level, bool) or not isinstance(level, (int, float, np.integer, np.floating)) or not 0 < level < 1:
        raise InputError(f"`confidence_level` must be in (0, 1); got {level!r}")
    return float(level)


def check_cluster(cluster: object) -> str:
    """One of :data:`~.constants.CLUSTERS`."""
    if cluster not in CLUSTERS:
        raise InputError(f"`cluster` must be one of {', '.join(CLUSTERS)}; got {cluster!r}")
    return str(cluster)


def check_count(name: str, value: object, minimum: int) -> int:
    """A whole number (``bool`` refused) of at least ``minimum``; the error names ``name``."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise InputError(f"`{name}` must be an integer >= {minimum}; got {value!r}")
    return int(value)


def check_positive(name: str, value: object) -> float:
    """A finite number > 0 (``bool`` refused), as a float; the error names ``name``."""
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)) \
            or not math.isfinite(value) or value <= 0:
        raise InputError(f"`{name}` must be a finite number > 0; got {value!r}")
    return float(value)


def check_experiment(experiment: object) -> None:
    """An :class:`~.spec.Experiment` (what :func:`~.spec.load_experiment` returns)."""
    if not isinstance(experiment, Experiment):
        raise InputError("`experiment` must be an Experiment (see load_experiment)")


def check_experiment_rule(experiment: Experiment) -> None:
    """The experiment's payment rule is one the estimator implements."""
    if experiment.payment_rule not in PAYMENT_RULES:
        raise InputError(f"experiment {experiment.id!r}: unknown payment_rule {experiment.payment_rule!r} "
                         f"(supported: {', '.join(PAYMENT_RULES)})")
