"""The analysis window of the experiment-to-date numbers: which days are combined, which are left out.

Pure: dates in, dates out. The pipeline reads the days' stored check outcomes and hands them here.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field

from .errors import InputError
from .spec import Experiment, parse_day

__all__ = ["PENDING_FLAGS", "WINDOW_CHECKS", "AnalysisWindow", "analysis_window", "format_days", "pending_status"]

#: Checks whose failure on a day leaves that day out of the experiment-to-date numbers by default.
WINDOW_CHECKS = ("warmup", "drift")
#: Status flag of the experiment-to-date rows of a day whose window uses no day yet, per reason a day is left out.
PENDING_FLAGS = {"burn_in": "warming_up", "warmup": "warming_up", "excluded": "days_excluded", "drift": "drifting"}


@dataclass(frozen=True)
class AnalysisWindow:
    """Days combined into the experiment-to-date numbers and the days left out, with the reason.

    Attributes
    ----------
    used : tuple of datetime.date
        Sorted.
    left_out : dict of datetime.date to str
        Reason per day: ``burn_in``, ``excluded`` (the spec's ``exclude_days``) or the failed
        checks of :data:`WINDOW_CHECKS`, joined by ``+``.
    """

    used: tuple[dt.date, ...]
    left_out: Mapping[dt.date, str] = field(default_factory=dict)

    @property
    def days_used(self) -> str:
        """The used days as text ranges (``2026-03-04..2026-03-09,2026-03-12``; empty when none)."""
        return format_days(self.used)

    @property
    def days_left_out(self) -> str:
        """The days left out as text ranges, each run followed by its reason in parentheses."""
        parts, run, reason = [], [], None
        for day in sorted(self.left_out):
            why = self.left_out[day]
            if run and (why != reason or (day - run[-1]).days != 1):
                parts.append(f"{format_days(run)} ({reason})")
                run = []
            run.append(day)
            reason = why
        if run:
            parts.append(f"{format_days(run)} ({reason})")
        return ",".join(parts)


def format_days(days: Iterable[dt.date]) -> str:
    """Sorted days as comma-joined runs of consecutive days (``first..last`` or one day)."""
    days = sorted(set(days))
    runs: list[list[dt.date]] = []
    for day in days:
        if runs and (day - runs[-1][-1]).days == 1:
            runs[-1].append(day)
        else:
            runs.append([day])
    return ",".join(r[0].isoformat() if len(r) == 1 else f"{r[0].isoformat()}..{r[-1].isoformat()}" for r in runs)


def analysis_window(
    days: Iterable[object],
    experiment: Experiment,
    *,
    failed_checks: Mapping[object, Sequence[str]] | None = None,
    leave_out_failed: bool = True,
) -> AnalysisWindow:
    """Which of ``days`` the experiment-to-date numbers combine.

    Parameters
    ----------
    days : iterable of date-like
        Days with stored estimates (today included).
    experiment : Experiment
        Its ``burn_in_days`` (counted from ``start``, or from the first of ``days`` when the
        experiment has no start) and ``exclude_days``.
    failed_checks : mapping of date-like to list of str, optional
        Failed checks per day; a day on which a check of :data:`WINDOW_CHECKS` failed is left out.
    leave_out_failed : bool, optional
        False keeps the days whose checks failed (burn-in and excluded days are still left out).

    Returns
    -------
    AnalysisWindow
        Reasons, first match: ``burn_in``, ``excluded``, the failed window checks.

    Notes
    -----
    The combination these days feed is the auction-weighted average over days of each day's
    counterfactual (``docs/method.md``); leaving a day out removes its auctions from both the
    numerator and the weights.
    """
    wanted = sorted({parse_day(d, what="day") for d in days})
    failed = {parse_day(k, what="failed_checks day"): v for k, v in (failed_checks or {}).items()}
    for day, checks in failed.items():
        if isinstance(checks, (str, bytes)) or not isinstance(checks, Sequence):
            raise InputError(f"failed_checks[{day}]: must be a list of check names; got {checks!r}")
    origin = experiment.start or (wanted[0] if wanted else None)
    burn_in_ends = None if origin is None else origin + dt.timedelta(days=int(experiment.burn_in_days))
    excluded = set(experiment.exclude_days)
    used, left_out = [], {}
    for day in wanted:
        window_failures = sorted(c for c in failed.get(day, ()) if c in WINDOW_CHECKS)
        if burn_in_ends is not None and day < burn_in_ends:
            left_out[day] = "burn_in"
        elif day in excluded:
            left_out[day] = "excluded"
        elif leave_out_failed and window_failures:
            left_out[day] = "+".join(window_failures)
        else:
            used.append(day)
    return AnalysisWindow(tuple(used), left_out)


def pending_status(window: AnalysisWindow) -> str:
    """Why the experiment-to-date rows of a window that uses no day hold no number yet.

    Parameters
    ----------
    window : AnalysisWindow
        A window with no day used.

    Returns
    -------
    str
        Sorted, comma-joined flags of :data:`PENDING_FLAGS`, one per reason a day was left out
        (``warming_up`` for burn-in and failed warm-up checks); ``no_days`` when nothing was left
        out either.
    """
    if window.used:
        raise InputError(f"pending_status: the window uses {len(window.used)} day(s); its rows have numbers")
    flags = {PENDING_FLAGS.get(part, "left_out") for why in window.left_out.values() for part in why.split("+")}
    return ",".join(sorted(flags)) or "no_days"
