"""The results-sink hook: the only code in counterbid that opens results-database connections.

The results sink is an embedded DuckDB file (connection type ``counterbid_duckdb``, the default) or
a PostgreSQL database (connection type ``postgres``, through the Airflow Postgres provider's
``PostgresHook`` and psycopg 3); every statement here is in the sink's dialect. The bid lake, the
click log and the staged files are read by :class:`counterbid.operators.lake_hook.LakeHook`, on
in-memory DuckDB, whatever the sink.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import logging
import os
import random
import time
import uuid
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

import duckdb
import pandas as pd
import pyarrow as pa
import pyarrow.dataset as pads
from airflow.sdk import BaseHook

from counterbid.estimators.errors import InputError
from counterbid.readers.memory_shards import memory_budget_mib
from counterbid.sql import validate_identifier

from .extras import require_extra
from .lookup_memory import lookup_memory_mib
from .results_schema import (
    POSTGRES_SCHEMES, RESULTS_TABLES, WINDOW_TABLES, DuckDBSession, PostgresSession, ResultsSession, ResultsTarget,
    WRITE_BATCH_ROWS, WindowWrite, check_readable,
    migrate, results_target, row_count, statement_for,
)

__all__ = [
    "DEFAULT_CONN_ID", "LOCK_ERROR", "POSTGRES_CONN_TYPE", "ResultsHook", "ResultsTarget", "is_lock_error",
    "results_target",
]

log = logging.getLogger(__name__)

DEFAULT_CONN_ID = "counterbid_results"
#: Airflow connection types of the two results sinks.
DUCKDB_CONN_TYPE = "counterbid_duckdb"
POSTGRES_CONN_TYPE = "postgres"
#: Text of DuckDB's error when another process holds the database file.
LOCK_ERROR = "Could not set lock on file"


def is_lock_error(exc: BaseException) -> bool:
    """Whether ``exc`` is DuckDB's file-lock conflict (retryable)."""
    return isinstance(exc, duckdb.Error) and LOCK_ERROR in str(exc)


def create_database_file(path: Path) -> None:
    """Create an empty DuckDB file at ``path`` unless one exists, atomically.

    Two processes opening a missing file at once race: one creates it, and the other can open it
    before its header is written and fail with "exists, but it is not a valid DuckDB database
    file". So a new file is made whole under a private name and hard-linked into place (the link
    fails if another process got there first; either way ``path`` is then a complete file).
    """
    if path.exists():
        return
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.{uuid.uuid4().hex[:8]}.new")
    try:
        duckdb.connect(str(tmp)).close()
        try:
            os.link(tmp, path)
        except FileExistsError:
            pass  # another writer created it first
        except OSError:  # no hard links on this filesystem: DuckDB creates the file itself, as before
            log.debug("cannot hard-link %s; DuckDB creates the results file", tmp)
    finally:
        tmp.unlink(missing_ok=True)
        tmp.with_name(tmp.name + ".wal").unlink(missing_ok=True)


#: Least DuckDB ``memory_limit`` of a results connection, in MiB.
RESULTS_MEMORY_FLOOR_MIB = 1024
#: Least DuckDB ``memory_limit`` of the write transaction's connection, in MiB.
RESULTS_WRITE_FLOOR_MIB = 768


def _whole(value: object, *, what: str, least: int) -> int:
    if isinstance(value, bool) or not str(value).strip().isdigit() or int(str(value).strip()) < least:
        raise InputError(f"`{what}` must be a whole number >= {least}; got {value!r}")
    return int(str(value).strip())


def results_memory_mib(value: object = None) -> int:
    """DuckDB's ``memory_limit`` for the results file, in MiB.

    Parameters
    ----------
    value : int, optional
        The limit (>= 1); default the memory budget
        (:func:`counterbid.readers.memory_shards.memory_budget_mib`, ``$COUNTERBID_MEMORY_BUDGET_MIB``),
        at least :data:`RESULTS_MEMORY_FLOOR_MIB` (300 MiB ran out of memory in a 1M-bid day's write
        transaction after 9 days of mostly new bidders).

    Returns
    -------
    int
    """
    if value is not None:
        return _whole(value, what="memory_limit_mib", least=1)
    return max(RESULTS_MEMORY_FLOOR_MIB, memory_budget_mib())


def results_write_memory_mib(value: object = None) -> int:
    """DuckDB's ``memory_limit`` for the results file during a day's write transaction, in MiB.

    The write inserts the day's staged rows (tens of millions of per-bidder rows on a large day)
    with DuckDB's own Parquet reader; full row groups go to the results file as they fill, and what
    DuckDB keeps beyond the limit is its cache of those blocks, evicted or spilled to
    ``<file>.tmp``. The write's process also holds the interpreter and its imports (about 0.35 GiB),
    so its limit is lower than the other connections'.

    Parameters
    ----------
    value : int, optional
        The limit (>= 1); default half the memory budget
        (:func:`counterbid.readers.memory_shards.memory_budget_mib`, ``$COUNTERBID_MEMORY_BUDGET_MIB``),
        at least :data:`RESULTS_WRITE_FLOOR_MIB`.

    Returns
    -------
    int
    """
    if value is not None:
        return _whole(value, what="write_memory_limit_mib", least=1)
    return max(RESULTS_WRITE_FLOOR_MIB, memory_budget_mib() // 2)


def _open_duckdb(path: str, read_only: bool, memory_mib: int, threads: int):
    """A connection to the results file whose database caps its buffer memory and threads.

    DuckDB keeps one database per file and process: when this process already holds the file open
    under other settings (a caller's own ``duckdb.connect``), the connection joins that database
    and its settings.
    """
    config = {"memory_limit": f"{int(memory_mib)}MiB", "threads": int(threads)}
    try:
        return duckdb.connect(path, read_only=read_only, config=config)
    except duckdb.ConnectionException as exc:
        if "different configuration" not in str(exc):
            raise
        log.debug("results file %s is already open in this process; its settings apply", path)
        return duckdb.connect(path, read_only=read_only)


class ResultsHook(BaseHook):
    """Access to the results database (DuckDB file or PostgreSQL): connections, migrations, writes, reads.

    Parameters
    ----------
    database : str, optional
        A DuckDB file path or a ``postgresql://`` URL (see :func:`results_target`). When not
        given, the Airflow connection ``counterbid_conn_id`` decides: conn type
        ``counterbid_duckdb`` (extra ``{"path": ...}`` or the host field holds the file path) or
        ``postgres`` (host, port, login, password, schema = database name, as for any
        ``PostgresHook`` connection).
    counterbid_conn_id : str, optional
        Connection id, default ``counterbid_results``.
    schema : str, optional
        Schema of the results tables, default ``main`` (validated identifier; in PostgreSQL it is
        created if missing).
    lock_timeout : float, optional
        Seconds to keep retrying when another process holds the DuckDB file lock.
    memory_limit_mib : int, optional
        DuckDB's ``memory_limit`` on a results file's connections, in MiB (default
        :func:`results_memory_mib`: ``$COUNTERBID_MEMORY_BUDGET_MIB``, at least
        :data:`RESULTS_MEMORY_FLOOR_MIB`); DuckDB spills to ``<file>.tmp`` beyond it.
    write_memory_limit_mib : int, optional
        The same for the connection of :meth:`replace_partition` (default ``memory_limit_mib``
        when given, else :func:`results_write_memory_mib`).
    threads : int, optional
        DuckDB's ``threads`` on those connections (default: 2, or fewer CPUs).

    Notes
    -----
    DuckDB lets one process hold a database file at a time (readers included), so every
    connection to a results file is short-lived and opening it retries on the lock error with
    jittered exponential back-off. PostgreSQL readers see the last committed state and are
    never locked out by a writer. Parquet (lake, click log, staging) is not read here: see
    :class:`counterbid.operators.lake_hook.LakeHook`.

    Every write first brings the results schema to this code's version
    (:func:`counterbid.operators.results_schema.migrate`), and every read refuses a schema of
    another version.
    """

    conn_name_attr = "counterbid_conn_id"
    default_conn_name = DEFAULT_CONN_ID
    conn_type = DUCKDB_CONN_TYPE
    hook_name = "counterbid results (DuckDB)"

    def __init__(
        self,
        *,
        database: str | Path | None = None,
        counterbid_conn_id: str | None = None,
        schema: str = "main",
        lock_timeout: float = 120.0,
        memory_limit_mib: int | None = None,
        threads: int | None = None,
        write_memory_limit_mib: int | None = None,
    ) -> None:
        super().__init__()
        self.memory_limit_mib = results_memory_mib(memory_limit_mib)
        self.write_memory_limit_mib = results_write_memory_mib(
            write_memory_limit_mib if write_memory_limit_mib is not None else memory_limit_mib)
        self.threads = _whole(threads, what="threads", least=1) if threads is not None else min(2, os.cpu_count() or 1)
        self.counterbid_conn_id = counterbid_conn_id or DEFAULT_CONN_ID
        self.schema = validate_identifier(schema, what="results schema")
        if not (isinstance(lock_timeout, (int, float)) and lock_timeout >= 0):
            raise InputError(f"`lock_timeout` must be a number of seconds >= 0; got {lock_timeout!r}")
        self.lock_timeout = float(lock_timeout)
        self._target = results_target(database) if database not in (None, "") else None

    # -- where the results go ----------------------------------------------------------------
    @property
    def target(self) -> ResultsTarget:
        """The results sink (from the argument or the Airflow connection)."""
        if self._target is None:
            conn = self.get_connection(self.counterbid_conn_id)
            if conn.conn_type == POSTGRES_CONN_TYPE:
                self._target = ResultsTarget("postgres", f"airflow connection {self.counterbid_conn_id}")
            elif conn.conn_type in (DUCKDB_CONN_TYPE, None, ""):
                path = (conn.extra_dejson or {}).get("path") or conn.host
                if not path:
                    raise InputError(f"connection {self.counterbid_conn_id!r}: set extra 'path' to the results DuckDB file")
                self._target = ResultsTarget("duckdb", str(path))
            else:
                raise InputError(f"connection {self.counterbid_conn_id!r}: conn type {conn.conn_type!r} is not a results "
                                 f"sink; use {DUCKDB_CONN_TYPE!r} or {POSTGRES_CONN_TYPE!r}")
        return self._target

    @property
    def dialect(self) -> str:
        """``'duckdb'`` or ``'postgres'``."""
        return self.target.dialect

    @property
    def database(self) -> str:
        """Path of the results DuckDB file, or the PostgreSQL URL / connection it names."""
        return self.target.location

    @property
    def where(self) -> str:
        """The results database as shown in logs and reports (no password)."""
        return self.target.shown

    # -- connections -------------------------------------------------------------------------
    @contextlib.contextmanager
    def connect(self, *, read_only: bool = False, memory_mib: int | None = None) -> Iterator[Any]:
        """A short-lived connection: DuckDB (retrying while another process holds the file) or psycopg.

        A psycopg connection is in autocommit mode; use ``con.transaction()`` for a transaction.
        ``memory_mib``: DuckDB's ``memory_limit`` of this connection (default ``memory_limit_mib``).
        """
        if self.dialect == "postgres":
            con = self._postgres_connection()
        else:
            if not read_only:
                create_database_file(Path(self.database))
            limit = self.memory_limit_mib if memory_mib is None else int(memory_mib)
            con = self._retry_on_lock(lambda: _open_duckdb(self.database, read_only, limit, self.threads), what="open")
        try:
            yield con
        finally:
            con.close()

    def _postgres_connection(self):
        require_extra("postgres", needed_by=f"results database {self.target.shown}")  # one line, not an ImportError
        from airflow.providers.postgres.hooks.postgres import PostgresHook

        if self._target is not None and self._target.location.startswith(tuple(f"{s}://" for s in POSTGRES_SCHEMES)):
            from airflow.sdk import Connection

            pg = PostgresHook(connection=Connection.from_uri(self._target.location, conn_id=self.counterbid_conn_id))
        else:
            pg = PostgresHook(postgres_conn_id=self.counterbid_conn_id)
        con = pg.get_conn()
        con.autocommit = True  # transactions are explicit (ResultsSession.transaction)
        return con

    @contextlib.contextmanager
    def session(self, *, read_only: bool = False, memory_mib: int | None = None) -> Iterator[ResultsSession]:
        """A :class:`~counterbid.operators.results_schema.ResultsSession` in this sink's dialect."""
        kind = PostgresSession if self.dialect == "postgres" else DuckDBSession
        with self.connect(read_only=read_only, memory_mib=memory_mib) as con:
            yield kind(con, schema=self.schema, sql=self.sql, where=self.where)

    def _retry_on_lock(self, action, *, what: str):
        deadline = time.monotonic() + self.lock_timeout
        delay = 0.05
        while True:
            try:
                return action()
            except duckdb.Error as exc:
                if not is_lock_error(exc) or time.monotonic() >= deadline:
                    raise
                log.info("results database %s is locked by another process; retrying %s in %.2fs", self.database, what, delay)
                time.sleep(delay * (0.5 + random.random()))
                delay = min(delay * 2, 2.0)

    def _with_retry(self, action, *, what: str):
        """``action()``, retried on DuckDB's file lock (PostgreSQL has none to wait for)."""
        return action() if self.dialect == "postgres" else self._retry_on_lock(action, what=what)

    def sql(self, name: str, **identifiers: str) -> str:
        """Statement ``name`` in this sink's dialect, with the results schema filled in (when it has a placeholder)."""
        return statement_for(name, self.dialect, self.schema, **identifiers)

    # -- results database --------------------------------------------------------------------
    def ensure_tables(self) -> list[int]:
        """Create the results schema, tables and views, or upgrade them to this version (idempotent).

        Returns
        -------
        list of int
            Migration versions applied (empty when the schema was current).
        """
        def run():
            with self.session() as s:
                return migrate(s)

        return self._with_retry(run, what="migrate")

    def fetch_df(self, name: str, params: Mapping[str, Any] | None = None) -> pd.DataFrame:
        """Run a read-only statement against the results database and return a DataFrame."""
        def run():
            with self.session(read_only=True) as s:
                check_readable(s)
                return s.fetch_df(name, params)

        return self._with_retry(run, what="read")

    def table_exists(self, table: str) -> bool:
        """Whether ``table`` (or a view of that name) exists in the results schema."""
        validate_identifier(table, what="table")
        if self.dialect == "duckdb" and not Path(self.database).exists():
            return False

        def run():
            with self.session(read_only=True) as s:
                return bool(s.scalar("results_table_exists", {"schema": self.schema, "table": table}))

        return self._with_retry(run, what="read")

    def replace_partition(
        self,
        *,
        experiment_id: str,
        ds: dt.date,
        tables: Mapping[str, pa.Table | pads.Dataset | None],
        window: WindowWrite | None = None,
    ) -> dict[str, int]:
        """Replace every row of one (experiment, day) in one transaction (delete, then insert).

        Parameters
        ----------
        experiment_id : str
        ds : datetime.date
        tables : mapping of str to pyarrow.Table
            Keys among the destinations of
            :data:`~counterbid.operators.results_schema.RESULTS_TABLES` (``arm_estimates``,
            ``arm_estimates_to_date``, ``position_weights``, the stratum-piece tables, ``bid_quantiles``);
            each table holds that destination's columns; a staged Parquet dataset
            (:func:`~counterbid.operators.results_schema.staged_rows`) travels in bounded batches,
            in the same transaction. Duplicate keys are dropped in SQL. ``None``
            deletes the destination's rows of the (experiment, day) and inserts none.
        window : WindowWrite, optional
            The running bidder window the day's estimate step computed, written in the same
            transaction. Without one, a stored window that covers ``ds`` is dropped (the day's
            pieces change under it); an ``'extend'`` whose base is no longer the stored window
            drops it too. A dropped window is rebuilt from the stored pieces on the next day.

        Returns
        -------
        dict of str to int
            Rows given for each destination (rows of other partitions are not written).
        """
        known = {t.destination: t for t in RESULTS_TABLES}
        unknown = sorted(set(tables) - set(known))
        if unknown:
            raise InputError(f"replace_partition: unknown destination {unknown[0]!r} (known: {', '.join(sorted(known))})")
        params = {"experiment_id": experiment_id, "ds": ds}

        def write() -> dict[str, int]:
            with self.session(memory_mib=self.write_memory_limit_mib) as s:
                migrate(s)
                counts = {}
                with s.transaction():
                    s.lock_partition("estimates", experiment_id=experiment_id, ds=ds)
                    for dest, table in tables.items():
                        s.execute(f"results_delete_{dest}", params)
                        if table is None:  # nothing for this destination now: the old rows go
                            counts[dest] = 0
                            continue
                        s.insert_rows(known[dest], table, params)
                        counts[dest] = row_count(table)
                    counts.update(_write_window(s, experiment_id=experiment_id, ds=ds, window=window))
                return counts

        return self._with_retry(write, what="write")

    def bidder_window(self, *, experiment_id: str) -> tuple[pd.DataFrame, pd.DataFrame] | None:
        """The stored running bidder window of an experiment, or ``None``.

        Returns its rows (the pooled one, ``segment`` null, first; then one per segment) and its
        Gram rows (``segment``, ``arm_i``, ``arm_j``, ``value``).
        """
        rows = self._fetch_if_present("bidder_window", "bidder_window_select", {"experiment_id": experiment_id})
        if rows is None or rows.empty:
            return None
        return rows, self.fetch_df("bidder_window_gram_select", {"experiment_id": experiment_id})

    def bidder_window_totals(self, *, experiment_id: str, today: pa.Table) -> pa.Table:
        """Stored running totals of the bidders in ``today`` (rows of ``bidder_window_totals``), joined in SQL.

        Returns ``segment``, ``bidder_id`` and ``sums`` (a list per bidder, in the window's
        ``sum_labels`` order) of the (segment, bidder) pairs of ``today`` the window holds.
        """
        dest = WINDOW_TABLES[-1]
        # a cap set by today's rows, not by the stored window the lookup scans (see .lookup_memory)
        memory = lookup_memory_mib(today.num_rows, today.column("bidder_id").nbytes, limit_mib=self.memory_limit_mib)

        def run():
            with self.session(read_only=True, memory_mib=memory) as s:
                check_readable(s)
                with s.transaction(), s.incoming(dest, today):
                    return s.fetch_arrow("bidder_window_totals_select_incoming", {"experiment_id": experiment_id})

        return self._with_retry(run, what="read")

    def _fetch_if_present(self, table: str, name: str, params: Mapping[str, Any]) -> pd.DataFrame | None:
        """``fetch_df(name, params)`` when the results file holds ``table``, else ``None``."""
        if not self.table_exists(table):
            return None
        return self.fetch_df(name, params)

    def trailing_bid_quantiles(self, *, experiment_id: str, first_day: dt.date, ds: dt.date) -> pd.DataFrame | None:
        """Stored bid-quantile summaries of the days ``first_day .. ds - 1`` (``None`` when there are none)."""
        rows = self._fetch_if_present("bid_quantiles", "bid_quantiles_select_trailing",
                                      {"experiment_id": experiment_id, "first_day": first_day, "ds": ds})
        return None if rows is None or rows.empty else rows

    def window_failures(self, *, experiment_id: str, ds: dt.date, checks: list[str]) -> dict[dt.date, list[str]]:
        """Days before ``ds`` on which a check of ``checks`` failed, with the failed checks (stored outcomes)."""
        rows = self._fetch_if_present("data_checks", "data_checks_select_window_failures",
                                      {"experiment_id": experiment_id, "ds": ds, "checks": list(checks)})
        if rows is None:
            return {}
        return {pd.Timestamp(d).date(): str(c).split(",") for d, c in zip(rows["ds"], rows["failed_checks"])}

    def stored_piece_days(self, *, experiment_id: str, ds: dt.date) -> list[dt.date]:
        """Days before ``ds`` whose stratum pieces are stored."""
        rows = self._fetch_if_present("stratum_pieces", "stratum_pieces_select_days",
                                      {"experiment_id": experiment_id, "ds": ds})
        return [] if rows is None else [pd.Timestamp(d).date() for d in rows["ds"]]

    def stored_piece_frames(self, *, experiment_id: str, days: list[dt.date], tables: list[str]) -> dict[str, pd.DataFrame | None]:
        """Stored rows of the given days from each stratum-piece table (``<table>_select.sql``)."""
        out: dict[str, pd.DataFrame | None] = {}
        for table in tables:
            validate_identifier(table, what="table")
            rows = None if not days else self._fetch_if_present(table, f"{table}_select",
                                                                {"experiment_id": experiment_id, "days": list(days)})
            out[table] = None if rows is None or rows.empty else rows
        return out

    def stored_bidder_sum_batches(self, *, experiment_id: str, days: list[dt.date],
                                  batch_rows: int = WRITE_BATCH_ROWS) -> Iterator[pa.RecordBatch]:
        """Stored ``stratum_piece_bidder_sums`` rows of the given days, streamed in record batches.

        Parameters
        ----------
        experiment_id : str
        days : list of datetime.date
        batch_rows : int, optional
            Rows per batch, at most (default
            :data:`~counterbid.operators.results_schema.WRITE_BATCH_ROWS`).

        Yields
        ------
        pyarrow.RecordBatch
            Columns ``ds``, ``n_bidders``, ``segment``, ``shard``, ``bidder_id``, ``arm``, ``value``, in no
            particular order; one connection (DuckDB: read-only; PostgreSQL: a server-side cursor)
            stays open while the batches are read.
        """
        if not days or not self.table_exists("stratum_piece_bidder_sums"):
            return
        with self.session(read_only=True) as s:
            check_readable(s)
            yield from s.fetch_batches("stratum_piece_bidder_sums_select_stream",
                                       {"experiment_id": experiment_id, "days": list(days)}, batch_rows=batch_rows)

    def grant_reader(self, role: str):
        """Create (if missing) the read-only role ``role`` for dashboards; PostgreSQL only.

        Migrates the schema first, then :func:`counterbid.operators.reader_role.grant_reader`.
        Returns its :class:`~counterbid.operators.reader_role.ReaderGrant`.
        """
        from .reader_role import grant_reader

        if self.dialect != "postgres":
            raise InputError(f"{self.where}: a DuckDB results file has no roles; dashboards open it read-only "
                             "(duckdb.connect(path, read_only=True))")
        with self.session() as s:
            migrate(s)
            return grant_reader(s, role)

    def record_checks(self, recorder, results, *, experiment_id: str, ds: dt.date, run_id: str) -> int:
        """Store check outcomes with ``recorder(session, results, experiment_id=, ds=, run_id=, schema=)``."""
        def write():
            with self.session() as s:
                return recorder(s, list(results), experiment_id=experiment_id, ds=ds, run_id=run_id, schema=self.schema)

        return self._with_retry(write, what="record checks")


_WINDOW_LOCK_DAY = dt.date(1970, 1, 1)  # the window is one experiment's, not one day's


def _write_window(s: ResultsSession, *, experiment_id: str, ds: dt.date, window: WindowWrite | None) -> dict[str, int]:
    """Apply (or drop) the running bidder window inside the day's write transaction."""
    by_experiment = {"experiment_id": experiment_id}
    s.lock_partition("bidder_window", experiment_id=experiment_id, ds=_WINDOW_LOCK_DAY)
    stored = s.fetch_df("bidder_window_select", by_experiment)
    stored_days = None if stored.empty else str(stored["days_used"].iloc[0])
    covers_today = stored_days is not None and ds.isoformat() in stored_days.split(",")
    if window is None and not covers_today:
        return {}
    if window is None or window.mode == "replace" or stored_days != window.base_days:
        for dest in WINDOW_TABLES:  # dropped (rebuilt on the next day), or about to be written whole
            s.execute(f"results_delete_{dest.destination}", by_experiment)
        if window is None or window.mode == "extend":
            return {dest.destination: 0 for dest in WINDOW_TABLES}
    counts = {}
    for dest in WINDOW_TABLES:
        rows = window.tables[dest.destination]
        with s.incoming(dest, rows):
            if window.mode == "extend":  # today's bidders only; the others' totals stay
                incoming = dest.destination == "bidder_window_totals"
                s.execute(f"results_delete_{dest.destination}{'_incoming' if incoming else ''}", by_experiment)
            s.execute(f"results_insert_{dest.destination}", by_experiment)
        counts[dest.destination] = row_count(rows)
    return counts
