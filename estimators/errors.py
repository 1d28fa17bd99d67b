"""Errors raised at the boundary of the estimator library."""

from __future__ import annotations

__all__ = ["InputError", "EstimatorWarning"]


class InputError(ValueError):
    """Bad input: the message is one line that names the file, column, row or key at fault."""


class EstimatorWarning(UserWarning):
    """A degenerate case that yields NaN (or an excluded subset) rather than a crash."""
