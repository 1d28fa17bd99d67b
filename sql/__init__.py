"""SQL statements as package data: one statement per ``.sql`` file.

Values are always bound as parameters (``$name``). The only text substituted into a statement is
an identifier placeholder ``{{ name }}`` (a schema), validated against :data:`IDENTIFIER` and
double-quoted before it is inserted.

Dialects. Every statement is written once, in DuckDB's dialect (``name.sql``); for another
dialect (:data:`DIALECTS`) :func:`statement` transpiles it with sqlglot, which also turns the
DuckDB named parameters ``$name`` into psycopg's ``%(name)s``. Where a statement cannot be shared
it has an explicit per-dialect file ``name.<dialect>.sql``, written in that dialect (with
psycopg's ``%(name)s`` for PostgreSQL), which then takes precedence; a statement that only one
dialect needs has only that file. The Spark engine's statements (:data:`ENGINE_DIALECTS`) are
only such files, ``name.spark.sql`` in Spark SQL with Spark's ``:name`` parameters; nothing is
transpiled to them.
"""

from __future__ import annotations

import re
from functools import lru_cache
from importlib import resources

from counterbid.estimators.errors import InputError

__all__ = [
    "DIALECTS", "ENGINE_DIALECTS", "IDENTIFIER", "dialect_files", "has_dialect_file", "load_sql", "parameter_names", "quote_identifier", "render_sql", "sql_names",
    "statement", "validate_identifier",
]

#: SQL dialects a statement can be produced for (sqlglot's dialect names). The sources are DuckDB.
DIALECTS = ("duckdb", "postgres")
#: Dialects of an engine's own statements: ``name.<dialect>.sql`` files only, never transpiled.
ENGINE_DIALECTS = ("spark",)

#: Identifiers taken from configuration: a letter or underscore, then letters, digits, underscores.
IDENTIFIER = re.compile(r"^[A-Za-z_][A-Za-z0-9_]{0,62}$")
_FILE = re.compile(r"^[a-z0-9_]+$")
_DIALECT_FILE = re.compile(r"^([a-z0-9_]+)\.([a-z]+)\.sql$")
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


def sql_names(dialect: str | None = None) -> list[str]:
    """Names (without ``.sql``) of the statements shipped in this package.

    Parameters
    ----------
    dialect : str, optional
        When given, the statements available in that dialect: every shared DuckDB source that
        has no file of another dialect only, plus that dialect's own ``name.<dialect>.sql``
        files. Without it, the shared sources only (``name.sql``).
    """
    root = resources.files(__name__)
    shared = {p.name[:-4] for p in root.iterdir() if p.name.endswith(".sql") and _FILE.match(p.name[:-4])}
    if dialect is None:
        return sorted(shared)
    _check_dialect(dialect)
    own = {m.group(1) for p in root.iterdir() if (m := _DIALECT_FILE.match(p.name)) and m.group(2) == dialect}
    return sorted(own if dialect in ENGINE_DIALECTS else shared | own)


def dialect_files() -> dict[str, list[str]]:
    """Per-dialect files: dialect -> statement names that have a ``name.<dialect>.sql`` file."""
    out: dict[str, list[str]] = {}
    for p in resources.files(__name__).iterdir():
        if m := _DIALECT_FILE.match(p.name):
            out.setdefault(m.group(2), []).append(m.group(1))
    return {k: sorted(v) for k, v in out.items()}


def _check_dialect(dialect: str) -> str:
    if dialect not in DIALECTS + ENGINE_DIALECTS:
        raise InputError(f"SQL dialect must be one of {', '.join(DIALECTS + ENGINE_DIALECTS)}; got {dialect!r}")
    return dialect


@lru_cache(maxsize=None)
def load_sql(name: str, dialect: str | None = None) -> str:
    """Text of the statement ``<name>.sql`` (or ``<name>.<dialect>.sql``) shipped in this package.

    Parameters
    ----------
    name : str
        File name without the ``.sql`` suffix.
    dialect : str, optional
        Load the per-dialect file ``<name>.<dialect>.sql`` instead of the shared source.

    Returns
    -------
    str

    Raises
    ------
    InputError
        Unknown name or dialect.
    """
    if not isinstance(name, str) or not _FILE.match(name):
        raise InputError(f"SQL statement name must be lowercase letters, digits and '_'; got {name!r}")
    suffix = ".sql" if dialect is None else f".{_check_dialect(dialect)}.sql"
    ref = resources.files(__name__) / f"{name}{suffix}"
    if not ref.is_file():
        where = "" if dialect is None else f" for dialect {dialect!r}"
        raise InputError(f"no SQL statement {name!r}{where} in counterbid.sql")
    return ref.read_text(encoding="utf-8")


def has_dialect_file(name: str, dialect: str) -> bool:
    """Whether ``name`` has its own ``name.<dialect>.sql`` file."""
    return (resources.files(__name__) / f"{name}.{_check_dialect(dialect)}.sql").is_file()


def render_sql(name: str, **identifiers: str) -> str:
    """Statement ``name`` with its ``{{ placeholder }}`` identifiers validated and quoted.

    Every placeholder in the file must be given and every given identifier must be used, so a
    typo fails loudly instead of producing a different query.
    """
    return _render(load_sql(name), name, identifiers)


def _render(text: str, name: str, identifiers: dict[str, str]) -> str:
    wanted = set(_PLACEHOLDER.findall(text))
    missing = sorted(wanted - set(identifiers))
    if missing:
        raise InputError(f"SQL statement {name!r} needs identifier {missing[0]!r}")
    unused = sorted(set(identifiers) - wanted)
    if unused:
        raise InputError(f"SQL statement {name!r} has no placeholder {unused[0]!r}")
    quoted = {k: quote_identifier(v, what=k) for k, v in identifiers.items()}
    return _PLACEHOLDER.sub(lambda m: quoted[m.group(1)], text)


def statement(name: str, *, dialect: str = "duckdb", **identifiers: str) -> str:
    """Statement ``name`` for ``dialect``, identifiers filled in (see :func:`render_sql`).

    Parameters
    ----------
    name : str
        Statement name.
    dialect : {'duckdb', 'postgres'}
        Target dialect. ``duckdb`` returns the source as rendered. Any other dialect uses the
        file ``name.<dialect>.sql`` when there is one, else transpiles the DuckDB source with
        sqlglot (parameters ``$name`` become ``%(name)s``); results are cached.
    **identifiers : str
        Values of the file's ``{{ placeholder }}`` identifiers.

    Returns
    -------
    str

    References
    ----------
    sqlglot, "SQL parser, transpiler, optimizer and engine", https://sqlglot.com
    """
    return _statement(name, _check_dialect(dialect), tuple(sorted(identifiers.items())))


@lru_cache(maxsize=1024)
def _statement(name: str, dialect: str, identifiers: tuple[tuple[str, str], ...]) -> str:
    ids = dict(identifiers)
    if has_dialect_file(name, dialect):
        return _render(load_sql(name, dialect), name, ids)
    if dialect == "duckdb":
        return render_sql(name, **ids)
    if dialect in ENGINE_DIALECTS:
        raise InputError(f"no SQL statement {name!r} for dialect {dialect!r} in counterbid.sql")
    import sqlglot

    source = render_sql(name, **ids)
    # comments are dropped: a `%` in one would read as a parameter marker to psycopg
    out = sqlglot.transpile(source, read="duckdb", write=dialect, unsupported_level=sqlglot.ErrorLevel.RAISE,
                            comments=False)
    if len(out) != 1:
        raise InputError(f"SQL statement {name!r} is not exactly one statement")
    return out[0]


_PSYCOPG_PARAM = re.compile(r"%\(([A-Za-z_][A-Za-z0-9_]*)\)s")


def parameter_names(text: str, *, dialect: str = "duckdb") -> set[str]:
    """Names of the bound parameters of a statement in ``dialect`` (``$name``, ``:name`` or ``%(name)s``).

    Parsed with sqlglot for DuckDB and Spark text (so a ``$`` or ``:`` inside a string literal is
    not a parameter); for PostgreSQL text the psycopg ``%(name)s`` markers are listed.
    """
    if _check_dialect(dialect) in ("duckdb", "spark"):
        import sqlglot
        from sqlglot import exp

        return {str(p.name) for p in sqlglot.parse_one(text, read=dialect).find_all(exp.Placeholder) if p.name}
    return set(_PSYCOPG_PARAM.findall(text))
