"""Data and equilibrium checks: outcomes as data.

Every check returns a :class:`CheckResult`; a failed ``error`` check stops the estimates of that
(experiment, day), a failed ``warning`` check marks them. The statistical checks themselves live
beside this type (pure numpy/scipy); the Great Expectations contract suite and the DuckDB
aggregates live in ``counterbid.operators``.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

__all__ = ["CheckResult", "SEVERITIES", "worst_failure"]

#: Severities, mildest first.
SEVERITIES = ("warning", "error")


@dataclass(frozen=True)
class CheckResult:
    """Outcome of one check on one (experiment, day).

    Attributes
    ----------
    check : str
        Check name (stable: it is a key of the ``data_checks`` table).
    severity : {'warning', 'error'}
    passed : bool
    observed : float or None
        The statistic the check measured (a p-value, a share, a count).
    threshold : float or None
        The bound it was compared with.
    details : dict
        JSON-serialisable context (first offending rows, per-arm counts, ...).
    """

    check: str
    severity: str
    passed: bool
    observed: float | None = None
    threshold: float | None = None
    details: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if self.severity not in SEVERITIES:
            raise ValueError(f"`severity` must be one of {SEVERITIES}; got {self.severity!r}")

    def describe(self) -> str:
        """One line: ``name: observed X vs threshold Y``."""
        obs = "n/a" if self.observed is None else f"{self.observed:.6g}"
        thr = "n/a" if self.threshold is None else f"{self.threshold:.6g}"
        state = "passed" if self.passed else "FAILED"
        return f"{self.check} [{self.severity}] {state}: observed {obs} vs threshold {thr}"


def worst_failure(results: Iterable[CheckResult]) -> str | None:
    """The most severe failed severity among ``results`` (``None`` when all passed)."""
    worst = None
    for r in results:
        if not r.passed and (worst is None or SEVERITIES.index(r.severity) > SEVERITIES.index(worst)):
            worst = r.severity
    return worst
