"""What each optional extra of counterbid installs, and one line when a setting needs a missing one.

A setting that needs an extra (results in PostgreSQL, the Spark engine) is checked where it is
read -- the command line before any day runs, the DAG file when it is parsed, the results hook
before it connects -- so a missing package stops the run up front with ``pip install
'counterbid[<extra>]'`` instead of a ``ModuleNotFoundError`` inside every task. Nothing here
imports Airflow (the command line checks before Airflow is configured).
"""

from __future__ import annotations

import importlib.metadata
import importlib.util

from counterbid.estimators.errors import InputError

__all__ = ["EXTRAS", "missing_from_extra", "require_extra", "require_extras_for"]

#: extra -> (top-level modules it must make importable, distributions it must install); pyproject.toml's lists.
EXTRAS: dict[str, tuple[tuple[str, ...], tuple[str, ...]]] = {
    "postgres": (("psycopg",), ("apache-airflow-providers-postgres",)),
    "spark": (("pyspark",), ("apache-airflow-providers-apache-spark",)),
}


def _importable(module: str) -> bool:
    try:
        return importlib.util.find_spec(module) is not None
    except (ImportError, ValueError):  # ValueError: sys.modules holds None for it (import blocked)
        return False


def _installed(distribution: str) -> bool:
    try:
        importlib.metadata.distribution(distribution)
    except importlib.metadata.PackageNotFoundError:
        return False
    return True


def missing_from_extra(extra: str) -> list[str]:
    """The modules and distributions of ``extra`` that this Python cannot find (empty: all there)."""
    modules, distributions = EXTRAS[extra]
    return [m for m in modules if not _importable(m)] + [d for d in distributions if not _installed(d)]


def require_extra(extra: str, *, needed_by: str) -> None:
    """Raise one :class:`InputError` line naming ``extra`` when any of its packages is missing.

    Parameters
    ----------
    extra : {'postgres', 'spark'}
    needed_by : str
        The setting that needs it, as the user wrote it (``--results postgresql://...``).

    Raises
    ------
    InputError
        ``<needed_by> needs the '<extra>' extra (<missing> not installed here): pip install 'counterbid[<extra>]'``.
    """
    if extra not in EXTRAS:
        raise InputError(f"unknown extra {extra!r} (known: {', '.join(EXTRAS)})")
    missing = missing_from_extra(extra)
    if missing:
        raise InputError(f"{needed_by} needs the '{extra}' extra ({', '.join(missing)} not installed here): "
                         f"pip install 'counterbid[{extra}]'")


def require_extras_for(*, results=None, engine: str | None = None, results_setting: str = "results database",
                       engine_setting: str = "engine") -> None:
    """Check the extras the given settings need: PostgreSQL results, the Spark engine.

    Parameters
    ----------
    results : ResultsTarget, optional
        Where results go (``results_schema.results_target``).
    engine : str, optional
        ``local`` or ``spark``.
    results_setting, engine_setting : str
        Names of the settings in the message (``--results``, ``COUNTERBID_ENGINE``).
    """
    if results is not None and results.dialect == "postgres":
        require_extra("postgres", needed_by=f"{results_setting} {results.shown}")
    if engine == "spark":
        require_extra("spark", needed_by=f"{engine_setting}=spark")
