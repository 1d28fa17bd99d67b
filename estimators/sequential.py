"""Anytime-valid bounds for experiment-to-date estimates: asymptotic confidence sequences.

The experiment-to-date estimate is looked at every day. A fixed interval holds at one planned look;
looked at daily until it excludes zero, it excludes a true zero far more often than its level says.
This module turns a to-date estimate and its standard error into bounds that hold at every look at
once, with the normal-mixture boundary of an asymptotic confidence sequence (math and the argument
for the to-date estimate: ``docs/method.md``, "Looking every day: anytime-valid bounds").

Pure numpy/scipy: it post-processes (estimate, standard error, units to date, planned units) and
knows nothing of how the estimate was combined.
"""

from __future__ import annotations

import datetime as _dt
import math
from dataclasses import dataclass

import numpy as np
from scipy import special

from ._validate import check_confidence_level, check_positive
from .errors import InputError
from .spec import Experiment

__all__ = [
    "DEFAULT_PLANNED_DAYS",
    "AnytimeBounds",
    "anytime_bounds",
    "anytime_multiplier",
    "mixture_tuning",
    "planned_days",
]

#: Days combined at the planned last look when the spec gives no ``end`` (four weeks).
DEFAULT_PLANNED_DAYS = 28


def mixture_tuning(confidence_level: float = 0.95) -> float:
    """``rho^2 t*``: the mixture scale, in units of the planned information, that is tightest there.

    Parameters
    ----------
    confidence_level : float
        ``1 - alpha``, in (0, 1).

    Returns
    -------
    float
        ``x* = -W_{-1}(-alpha^2 / e) - 1``, the minimiser over ``x = rho^2 t`` of the boundary's
        half width at ``t`` in standard errors, ``sqrt((1 + 1/x)(log(1 + x) + 2 log(1/alpha)))``
        (setting its derivative to zero gives ``x = log(1 + x) + 2 log(1/alpha)``, solved by the
        lower branch of Lambert's W). At that optimum the half width is ``sqrt(1 + x*)`` standard
        errors: 3.035 at 95 %.

    References
    ----------
    .. [1] Howard, S. R., Ramdas, A., McAuliffe, J. & Sekhon, J. (2021). Time-uniform, nonparametric,
       nonasymptotic confidence sequences. Annals of Statistics 49(2), 1055-1080 (the normal
       mixture boundary and its tuning for a planned time).
    .. [2] Corless, R. M. et al. (1996). On the Lambert W function. Adv. Comput. Math. 5, 329-359 (from memory).
    """
    alpha = 1.0 - check_confidence_level(confidence_level)
    w = special.lambertw(-alpha * alpha / math.e, k=-1)
    return float(-w.real - 1.0)


def anytime_multiplier(information_ratio, *, confidence_level: float = 0.95) -> np.ndarray:
    """Half width of the anytime-valid bounds in standard errors, at a look with ``information_ratio``.

    Parameters
    ----------
    information_ratio : float or array_like
        ``t / t*``: units to date (auctions) over the planned units at the last planned look; > 0.
    confidence_level : float
        ``1 - alpha`` of the confidence sequence (all looks at once), in (0, 1).

    Returns
    -------
    numpy.ndarray
        ``sqrt((1 + 1/x)(log(1 + x) + 2 log(1/alpha)))`` with ``x = x* t / t*``
        (:func:`mixture_tuning`): the two-sided normal-mixture boundary of a standard Brownian
        motion at time ``t``, divided by ``sqrt(t)``. Always above the fixed interval's
        ``z_{1 - alpha/2}``; smallest (``sqrt(1 + x*)``) at ``t = t*``.

    References
    ----------
    .. [1] Robbins, H. (1970). Statistical methods related to the law of the iterated logarithm.
       Annals of Mathematical Statistics 41(5), 1397-1409.
    .. [2] Waudby-Smith, I., Arbour, D., Sinha, R., Kennedy, E. H. & Ramdas, A. (2024). Time-uniform
       central limit theory and asymptotic confidence sequences. Annals of Statistics (cited from
       memory; volume not checked)
       (the asymptotic confidence sequence ``estimate +- std_error x`` this multiplier).
    """
    alpha = 1.0 - check_confidence_level(confidence_level)
    r = np.asarray(information_ratio, dtype=float)
    if r.size and not (np.all(np.isfinite(r)) and np.all(r > 0)):
        raise InputError("`information_ratio` must be finite and > 0 (units to date over planned units)")
    x = mixture_tuning(confidence_level) * r
    return np.sqrt((1.0 + 1.0 / x) * (np.log1p(x) + 2.0 * math.log(1.0 / alpha)))


@dataclass(frozen=True)
class AnytimeBounds:
    """Anytime-valid bounds of some to-date estimates at one look.

    Attributes
    ----------
    low, high : numpy.ndarray
        ``estimate -+ multiplier x std_error`` (NaN where the estimate or its standard error is).
    multiplier : float
        Half width in standard errors (:func:`anytime_multiplier`).
    fixed_multiplier : float
        The fixed interval's ``z_{(1 + level)/2}``, for comparison.
    information_ratio : float
        Units to date over planned units.
    confidence_level : float
    """

    low: np.ndarray
    high: np.ndarray
    multiplier: float
    fixed_multiplier: float
    information_ratio: float
    confidence_level: float

    @property
    def width_ratio(self) -> float:
        """Width of the anytime-valid bounds over the fixed interval's (same standard error)."""
        return self.multiplier / self.fixed_multiplier


def anytime_bounds(estimate, std_error, *, units: float, planned_units: float,
                   confidence_level: float = 0.95) -> AnytimeBounds:
    """Bounds that hold at every look of the experiment to date at once.

    Parameters
    ----------
    estimate, std_error : float or array_like
        The to-date estimates and their standard errors (one look, any number of rows).
    units : float
        Independent units combined so far (auctions to date), > 0.
    planned_units : float
        Units at the planned last look, where the bounds are tuned to be tightest, > 0. Fix it
        before the first look (it sets the mixture; changing it between looks voids the guarantee).
    confidence_level : float
        Probability, over the whole sequence of looks, that every look's bounds cover.

    Returns
    -------
    AnytimeBounds

    Notes
    -----
    ``estimate -+ std_error x sqrt((1 + 1/x)(log(1 + x) + 2 log(1/alpha)))``, ``x = x* units /
    planned_units``. For an asymptotically linear estimator whose scaled error follows a Brownian
    motion in the units (independent increments), the boundary is crossed at some look with
    probability at most ``alpha`` (Ville's inequality on the normal mixture martingale [1]_);
    with the standard error estimated it holds asymptotically [2]_. Looks more correlated than
    independent increments (bidders whose values persist across days) cross it less often
    (``docs/method.md``).

    References
    ----------
    .. [1] Robbins, H. (1970). Statistical methods related to the law of the iterated logarithm.
       Annals of Mathematical Statistics 41(5), 1397-1409.
    .. [2] Waudby-Smith, I., Arbour, D., Sinha, R., Kennedy, E. H. & Ramdas, A. (2024). Time-uniform
       central limit theory and asymptotic confidence sequences. Annals of Statistics (cited from
       memory; volume not checked).

    Examples
    --------
    >>> b = anytime_bounds(0.012, 0.004, units=7 * 1200, planned_units=28 * 1200)
    >>> round(b.multiplier, 3), round(b.width_ratio, 3), round(float(b.low), 4)
    (3.251, 1.659, -0.001)
    """
    level = check_confidence_level(confidence_level)
    units, planned_units = check_positive("units", units), check_positive("planned_units", planned_units)
    est = np.asarray(estimate, dtype=float)
    se = np.asarray(std_error, dtype=float)
    if est.shape != se.shape:
        raise InputError(f"`estimate` and `std_error` must have one shape; got {est.shape} and {se.shape}")
    if np.any(se < 0):
        raise InputError("`std_error` must be >= 0 (or NaN)")
    ratio = float(units) / float(planned_units)
    m = float(anytime_multiplier(ratio, confidence_level=level))
    return AnytimeBounds(low=est - m * se, high=est + m * se, multiplier=m,
                         fixed_multiplier=float(special.ndtri(0.5 + level / 2)),  # scipy.stats.norm.ppf, unloaded
                         information_ratio=ratio,
                         confidence_level=level)


def planned_days(experiment: Experiment) -> int:
    """Days the experiment-to-date numbers will combine at the planned last look.

    Parameters
    ----------
    experiment : Experiment

    Returns
    -------
    int
        With ``start`` and ``end`` in the spec: the days from ``start`` to ``end`` (inclusive) less
        ``burn_in_days`` and the listed ``exclude_days`` in that range (at least 1). Otherwise
        :data:`DEFAULT_PLANNED_DAYS`. Days a failed warm-up or drift check will leave out are not
        known in advance and are not subtracted.
    """
    if not isinstance(experiment, Experiment):
        raise InputError("`experiment` must be an Experiment (see load_experiment)")
    if experiment.start is None or experiment.end is None:
        return DEFAULT_PLANNED_DAYS
    first = experiment.start + _dt.timedelta(days=experiment.burn_in_days)
    days = (experiment.end - first).days + 1
    days -= sum(1 for d in experiment.exclude_days if first <= d <= experiment.end)
    return max(1, days)
