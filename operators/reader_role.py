"""A read-only role for dashboards on the PostgreSQL results sink.

:func:`grant_reader` creates a group role (``nologin``) if it is missing and grants it ``usage``
on the results schema and ``select`` on every table and view there, now and -- through default
privileges of the writer -- on those a later migration creates. Nothing else: the role can
insert, update, delete, create or drop nothing in the results schema. A dashboard logs in as its
own user, a member of the role (``grant <role> to <user>``). A DuckDB results file has no roles:
read-only there means opening the file read-only (``duckdb.connect(path, read_only=True)``).
"""

from __future__ import annotations

from dataclasses import dataclass

from counterbid.estimators.errors import InputError
from counterbid.sql import validate_identifier

from .results_schema import ResultsSession

__all__ = ["ReaderGrant", "grant_reader"]

#: Statements run in order, each with the role (and the results schema) filled in.
GRANTS = ("results_reader_grant_usage", "results_reader_grant_select", "results_reader_default_select")


@dataclass(frozen=True)
class ReaderGrant:
    """What :func:`grant_reader` did: the role, whether it was created, and what it can read."""

    role: str
    schema: str
    created: bool
    readable: tuple[str, ...]

    def line(self, where: str) -> str:
        """One line for the command's output."""
        made = "created" if self.created else "already existed"
        return (f"role {self.role} ({made}) can read the {len(self.readable)} tables and views of schema "
                f"{self.schema} in {where}, and write nothing; dashboards log in as a member "
                f"(grant {self.role} to <user>)")


def grant_reader(session: ResultsSession, role: str) -> ReaderGrant:
    """Create (if missing) the read-only role ``role`` and grant it every results table and view.

    Parameters
    ----------
    session : ResultsSession
        A writable PostgreSQL session of the writer (the owner of the results tables), not inside
        a transaction; the schema must be current (:func:`~counterbid.operators.results_schema.migrate`).
    role : str
        Role name (a plain identifier).

    Returns
    -------
    ReaderGrant

    Raises
    ------
    InputError
        A DuckDB session, a bad role name, or a role that is a superuser.

    References
    ----------
    PostgreSQL documentation, "GRANT" and "ALTER DEFAULT PRIVILEGES" (privileges on all tables of
    a schema, and on those created later by the same role).
    """
    validate_identifier(role, what="reader role")
    if session.dialect != "postgres":
        raise InputError(f"{session.where}: a DuckDB results file has no roles; dashboards open it read-only "
                         "(duckdb.connect(path, read_only=True))")
    with session.transaction():
        superuser = session.scalar("results_reader_role", {"role": role})
        if superuser:
            raise InputError(f"{session.where}: role {role!r} is a superuser and can write anything; "
                             "name another role for dashboards")
        created = superuser is None
        if created:
            session.execute("results_reader_create_role", role=role)
        for name in GRANTS:
            session.execute(name, role=role)
        readable = tuple(r[0] for r in session.execute("results_schema_objects", {"schema": session.schema}).fetchall())
    return ReaderGrant(role=role, schema=session.schema, created=created, readable=readable)
