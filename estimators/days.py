"""Days: the one parser of a calendar day (spec keys, Airflow's ``{{ ds }}``, command-line options)."""

from __future__ import annotations

import datetime as _dt
from typing import Any

import numpy as np

from .errors import InputError

__all__ = ["parse_day"]


def parse_day(value: Any, *, what: str = "ds") -> _dt.date:
    """A calendar day from a ``date``, a ``datetime`` or an ISO 8601 text.

    Parameters
    ----------
    value : date, datetime, numpy.datetime64 or str
        ``datetime`` values (``pandas.Timestamp`` included) give their date; texts are
        ``YYYY-MM-DD`` or an ISO date-time such as Airflow's ``2026-03-02T00:00:00+00:00``.
        Numbers are refused.
    what : str, optional
        What is being parsed (``ds``, ``--start``, a spec key); named in the error message.

    Returns
    -------
    datetime.date

    Raises
    ------
    InputError
        ``value`` is not a day; the message names ``what`` and shows the value.

    Examples
    --------
    >>> parse_day("2026-03-02T00:00:00+00:00")
    datetime.date(2026, 3, 2)
    """
    if isinstance(value, _dt.datetime):
        return value.date()
    if isinstance(value, _dt.date):
        return value
    text = value if isinstance(value, str) else str(value)[:10] if isinstance(value, np.datetime64) else None
    try:
        if text is not None and len(text) > 10 and text[10] in "T ":  # a date-time: its date
            return _dt.datetime.fromisoformat(text).date()
        if text is not None:
            return _dt.date.fromisoformat(text)
    except ValueError:
        pass
    raise InputError(f"{what}: must be a date YYYY-MM-DD; got {value!r}")
