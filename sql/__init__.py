"""SQL statements as package data: one statement per ``.sql`` file.

Values are always bound as parameters (``$name``). The only text substituted into a statement is
an identifier placeholder ``{{ name }}`` (a schema), validated against :data:`IDENTIFIER` and
double-quoted before it is inserted.
"""

from __future__ import annotations

import re
from functools import lru_cache
from importlib import resources

from counterbid.estimators.errors import InputError

__all__ = ["IDENTIFIER", "load_sql", "quote_identifier", "render_sql", "sql_names", "validate_identifier"]

#: Identifiers taken from configuration: a letter or underscore, then letters, digits, underscores.
IDENTIFIER = re.compile(r"^[A-Za-z_][A-Za-z0-9_]{0,62}$")
_FILE = re.compile(r"^[a-z0-9_]+$")
_PLACEHOLDER = re.compile(r"\{\{\s*([A-Za-z_][A-Za-z0-9_]*)\s*\}\}")


def validate_identifier(value: object, *, what: str = "identifier") -> str:
    """Return ``value`` if it is a plain SQL identifier, else raise :class:`InputError`.

    Parameters
    ----------
    value : object
        Candidate identifier (a schema or table name from configuration).
    what : str
        Name of the setting, used in the error message.
    """
    if not isinstance(value, str) or not IDENTIFIER.match(value):
        raise InputError(
            f"{what} must be 1-63 characters of letters, digits and '_' not starting with a digit; got {value!r}"
        )
    return value


def quote_identifier(value: object, *, what: str = "identifier") -> str:
    """Validated identifier in double quotes (safe for reserved words)."""
    return '"' + validate_identifier(value, what=what) + '"'


def sql_names() -> list[str]:
    """Names (without ``.sql``) of every statement shipped in this package."""
    root = resources.files(__name__)
    return sorted(p.name[:-4] for p in root.iterdir() if p.name.endswith(".sql"))


@lru_cache(maxsize=None)
def load_sql(name: str) -> str:
    """Text of the statement ``<name>.sql`` shipped in this package.

    Parameters
    ----------
    name : str
        File name without the ``.sql`` suffix.

    Returns
    -------
    str

    Raises
    ------
    InputError
        Unknown name.
    """
    if not isinstance(name, str) or not _FILE.match(name):
        raise InputError(f"SQL statement name must be lowercase letters, digits and '_'; got {name!r}")
    ref = resources.files(__name__) / f"{name}.sql"
    if not ref.is_file():
        raise InputError(f"no SQL statement {name!r} in counterbid.sql")
    return ref.read_text(encoding="utf-8")


def render_sql(name: str, **identifiers: str) -> str:
    """Statement ``name`` with its ``{{ placeholder }}`` identifiers validated and quoted.

    Every placeholder in the file must be given and every given identifier must be used, so a
    typo fails loudly instead of producing a different query.
    """
    text = load_sql(name)
    wanted = set(_PLACEHOLDER.findall(text))
    missing = sorted(wanted - set(identifiers))
    if missing:
        raise InputError(f"SQL statement {name!r} needs identifier {missing[0]!r}")
    unused = sorted(set(identifiers) - wanted)
    if unused:
        raise InputError(f"SQL statement {name!r} has no placeholder {unused[0]!r}")
    quoted = {k: quote_identifier(v, what=k) for k, v in identifiers.items()}
    return _PLACEHOLDER.sub(lambda m: quoted[m.group(1)], text)
