"""The results tables, their versioned migrations, and one session type per results sink.

A *sink* is where the results tables live: an embedded DuckDB file (``duckdb``) or a PostgreSQL
database (``postgres``). Everything that differs between the two is the SQL dialect (handled by
:func:`counterbid.sql.statement`: sqlglot transpiles the DuckDB sources, or a per-dialect file)
and how rows reach the server (DuckDB scans the Arrow table registered as ``incoming``, or a staged
Parquet file with its own reader through a temporary view of that name; PostgreSQL receives them by COPY, batch by batch, into a temporary table of that name). The code that writes,
migrates and reads is written once, against :class:`ResultsSession`.

Migrations. The schema's version is the highest row of ``counterbid_schema``. :data:`MIGRATIONS`
is the ordered list of steps; each step is a tuple of SQL statements run in one transaction with
the version row, views dropped before and created again after (they read the tables a step may
rebuild). A database older than the code is upgraded in place on its first write; one newer than
the code is refused. Adding a column is one more :class:`Migration`.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import re
import uuid
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd
import pyarrow as pa
import pyarrow.dataset as pads
import pyarrow.parquet as pq

from counterbid.estimators.errors import InputError
from counterbid.sql import has_dialect_file, load_sql, statement, validate_identifier

from .results_target import POSTGRES_SCHEMES, ResultsTarget, results_target

__all__ = [
    "MIGRATIONS", "RESULTS_TABLES", "RESULTS_VIEWS", "SCHEMA_VERSION", "DuckDBSession", "Migration",
    "POSTGRES_SCHEMES", "PostgresSession", "ResultsSession", "ResultsTable", "WINDOW_TABLES", "WindowWrite", "ResultsTarget", "Statement", "as_session",
    "migrate", "results_target", "schema_version", "WRITE_BATCH_ROWS", "staged_rows", "row_count", "row_batches",
]

#: Rows per batch when rows travel to a sink: what one write holds in memory at a time, whatever
#: the day's size (a staged Parquet dataset is read batch by batch, never whole).
WRITE_BATCH_ROWS = 65_536


def staged_rows(path: str | Path) -> pads.Dataset:
    """The rows of a staged Parquet file, to be written without reading them whole."""
    return pads.dataset(str(path), format="parquet")


def row_count(rows: pa.Table | pads.Dataset) -> int:
    """Rows of an Arrow table or a staged dataset (a dataset's from its Parquet footers)."""
    return rows.num_rows if isinstance(rows, pa.Table) else rows.count_rows()


def row_batches(rows: pa.Table | pads.Dataset, batch_rows: int | None = None) -> Iterator[pa.RecordBatch]:
    """``rows`` as record batches of at most ``batch_rows`` rows (default :data:`WRITE_BATCH_ROWS`)."""
    size = WRITE_BATCH_ROWS if batch_rows is None else int(batch_rows)
    if size < 1:
        raise InputError(f"row_batches: batch_rows must be at least 1, got {size}")
    if isinstance(rows, pa.Table):
        yield from rows.to_batches(max_chunksize=size)
        return
    if isinstance(rows, pads.FileSystemDataset):  # one file, one row group at a time: no read-ahead of the day
        for path in rows.files:
            with pq.ParquetFile(path) as staged:
                yield from staged.iter_batches(batch_size=size)
        return
    for batch in rows.to_batches(batch_size=size, batch_readahead=1, fragment_readahead=1):
        yield from (batch.slice(at, size) for at in range(0, batch.num_rows, size))

_PLACEHOLDER = re.compile(r"\{\{\s*([A-Za-z_][A-Za-z0-9_]*)\s*\}\}")


@dataclass(frozen=True)
class ResultsTable:
    """One results table written by :meth:`ResultsHook.replace_partition`.

    ``destination`` is its key in the ``tables`` mapping; its statements are
    ``results_delete_<destination>`` and ``results_insert_<destination>``.
    """

    destination: str
    table: str


#: Tables replaced per (experiment, day), in write order. A new table is one more entry here (with
#: its delete and insert statements) and a migration step that creates it.
RESULTS_TABLES = (
    ResultsTable("arm_estimates", "arm_estimates"),
    ResultsTable("arm_estimates_to_date", "arm_estimates_to_date"),
    ResultsTable("position_weights", "arm_position_weights"),
    ResultsTable("stratum_pieces", "stratum_pieces"),
    ResultsTable("stratum_piece_arms", "stratum_piece_arms"),
    ResultsTable("stratum_piece_covariance", "stratum_piece_covariance"),
    ResultsTable("stratum_piece_bidder_sums", "stratum_piece_bidder_sums"),
    ResultsTable("bid_quantiles", "bid_quantiles"),
)
#: The running bidder window (one experiment's rows, not one day's): written by
#: :meth:`~counterbid.operators.hooks.ResultsHook.replace_partition` with the day whose estimate
#: step computed them (``operators/window_state.py``).
WINDOW_TABLES = (
    ResultsTable("bidder_window", "bidder_window"),
    ResultsTable("bidder_window_gram", "bidder_window_gram"),
    ResultsTable("bidder_window_totals", "bidder_window_totals"),
)
@dataclass(frozen=True)
class WindowWrite:
    """An update of the running bidder window, written with the day that computed it.

    ``mode`` ``'extend'``: ``tables['bidder_window_totals']`` holds today's bidders only, and the
    update applies only when the stored window's ``days_used`` is still ``base_days`` (else the
    stored window is dropped: rebuilt on the next day). ``'replace'``: every row of the window.
    Tables are Arrow tables as computed, or the staged Parquet files (:func:`staged_rows`) when the
    write step loads them.
    """

    mode: str
    base_days: str | None
    tables: Mapping[str, pa.Table | pads.Dataset]


#: Views over the tables, in creation order: (view name, create statement).
RESULTS_VIEWS = (
    ("arm_estimates_cumulative", "results_create_view_cumulative"),
    ("arm_lift", "results_create_view_arm_lift"),
)


@dataclass(frozen=True)
class Statement:
    """A statement of a migration step, with the identifiers it needs besides the schema.

    ``dialects``: the sinks it runs on (default every one); a step's other sinks skip it.
    """

    name: str
    identifiers: Mapping[str, str] = field(default_factory=dict)
    dialects: tuple[str, ...] | None = None


def _rebuild(version: int, table: str) -> tuple[Statement, ...]:
    """Build ``<table>_next`` beside ``table``, copy the rows, drop ``table``, rename the new one.

    For a change DuckDB cannot make with ``alter table`` (a new constraint, a changed check):
    statements ``results_v<version>_create_<table>`` and ``results_v<version>_copy_<table>``.
    """
    version = f"v{version}"
    return (
        Statement(f"results_{version}_create_{table}"),
        Statement(f"results_{version}_copy_{table}"),
        Statement("results_drop_table", {"table": table}),
        Statement("results_rename_table", {"table": f"{table}_next", "new_name": table}),
    )


def _keyed_rebuild(version: int, table: str) -> tuple[Statement, ...]:
    """:func:`_rebuild`, then ``results_v<version>_index_<table>``: a key a primary key cannot hold (a null column)."""
    return _rebuild(version, table) + (Statement(f"results_v{version}_index_{table}"),)


@dataclass(frozen=True)
class Migration:
    """One step of the results schema: ``statements`` take a database from ``version - 1`` to ``version``."""

    version: int
    summary: str
    statements: tuple[Statement, ...]


#: Step 1 must stay idempotent (``create ... if not exists`` only): it also completes databases
#: written before versions were recorded.
MIGRATIONS = (
    Migration(1, "tables as first released: estimates, to-date estimates, position weights, data checks", (
        Statement("results_v1_create_arm_estimates"),
        Statement("results_v1_create_arm_estimates_to_date"),
        Statement("results_v1_create_position_weights"),
        Statement("results_v1_create_data_checks"),
    )),
    Migration(2, "estimates store the interval's confidence level and clustering, the payment rule and floor; status "
                 "holds flags; to-date rows name the days of their analysis window; stratum pieces and bid-quantile "
                 "summaries are stored",
              _rebuild(2, "arm_estimates") + _rebuild(2, "arm_estimates_to_date") + (
                  Statement("results_create_stratum_pieces"),
                  Statement("results_create_stratum_piece_arms"),
                  Statement("results_create_stratum_piece_covariance"),
                  Statement("results_create_stratum_piece_bidder_sums"),
                  Statement("results_create_bid_quantiles"),
              )),
    Migration(3, "experiment-to-date rows carry anytime-valid bounds (valid at every daily look) and the auctions "
                 "they are tuned for",
              (Statement("results_v3_add_anytime_low"), Statement("results_v3_add_anytime_high"),
               Statement("results_v3_add_anytime_horizon_auctions"))),
    Migration(4, "experiment-to-date rows from the first day: while no day of the window is used (warm-up, burn-in, "
                 "excluded days) the rows hold no estimate and a status saying why; first_ds null, n_days_used 0",
              _rebuild(4, "arm_estimates_to_date")),
    Migration(5, "rows may be layouts that did not run (what_if) with their effective share; stored stratum pieces "
                 "carry those layouts and their own-mixture variance",
              (Statement("results_v5_add_estimates_what_if"), Statement("results_v5_add_estimates_effective_share"),
               Statement("results_v5_add_to_date_what_if"), Statement("results_v5_add_to_date_effective_share"),
               Statement("results_v5_add_piece_arms_what_if"), Statement("results_v5_add_piece_arms_own_variance"))),
    Migration(6, "running bidder totals of each experiment's analysis window, so that a day's to-date rows read "
                 "only today's bidders",
              (Statement("results_v6_create_bidder_window"), Statement("results_v6_create_bidder_window_gram"),
               Statement("results_v6_create_bidder_window_totals"))),
    Migration(7, "rows and stored pieces carry the experiment's segment (null: pooled rows, or no segments); the "
                 "tables are keyed by unique indexes that hold the null segment as one key value",
              _keyed_rebuild(7, "arm_estimates") + _keyed_rebuild(7, "arm_estimates_to_date")
              + _keyed_rebuild(7, "stratum_pieces") + _keyed_rebuild(7, "stratum_piece_arms")
              + _keyed_rebuild(7, "stratum_piece_covariance") + (Statement("results_v7_add_bidder_sums_segment"),)),
    # PostgreSQL only: DuckDB's indexes serve point lookups, not the semi-join on today's bidders
    Migration(8, "an index on the running bidder totals by experiment and bidder id (PostgreSQL): a day reads and "
                 "replaces its own bidders' rows without scanning the experiment's",
              (Statement("results_v8_index_bidder_window_totals", dialects=("postgres",)),)),
    Migration(9, "the running bidder window is kept per segment too (segment null: the pooled window), keyed as in "
                 "version 7; a segmented experiment's to-date rows read only today's bidders",
              _keyed_rebuild(9, "bidder_window") + _keyed_rebuild(9, "bidder_window_gram")
              + (Statement("results_v9_add_bidder_window_totals_segment"),)),
    Migration(10, "the running bidder totals are one row per (segment, bidder) with every revenue label's total in "
                  "one list column, looked up by an integer key (63 bits of the id's md5); the window records the "
                  "labels' order",
              (Statement("results_v10_add_window_sum_labels"), Statement("results_v10_fill_window_sum_labels"))
              + _rebuild(10, "bidder_window_totals")
              + (Statement("results_v10_index_bidder_window_totals", dialects=("postgres",)),)),
)
#: Version of the results schema this code writes and reads.
SCHEMA_VERSION = MIGRATIONS[-1].version


# -- where the results go --------------------------------------------------------------------
# -- sessions ---------------------------------------------------------------------------------
class ResultsSession:
    """A connection to the results database in one dialect (see the subclasses).

    Parameters
    ----------
    con : connection
        A DuckDB connection or a psycopg 3 connection in autocommit mode.
    schema : str
        Schema of the results tables.
    sql : callable, optional
        ``sql(name, **identifiers) -> str``; default :func:`counterbid.sql.statement` in this
        session's dialect with the schema filled in (the hook passes its own, so tests can watch).
    where : str
        How to name the database in messages (a path, or a URL without its password).
    """

    dialect = ""

    def __init__(self, con, *, schema: str = "main", sql=None, where: str = "results database") -> None:
        self.con = con
        self.schema = validate_identifier(schema, what="results schema")
        self._sql = sql
        self.where = where

    def sql(self, name: str, **identifiers: str) -> str:
        """Statement ``name`` in this dialect, with the schema and ``identifiers`` filled in."""
        if self._sql is not None:
            return self._sql(name, **identifiers)
        return statement_for(name, self.dialect, self.schema, **identifiers)

    def execute(self, name: str, params: Mapping[str, Any] | None = None, **identifiers: str):
        raise NotImplementedError

    def scalar(self, name: str, params: Mapping[str, Any] | None = None, **identifiers: str):
        """First column of the first row (None when there is no row)."""
        row = self.execute(name, params, **identifiers).fetchone()
        return None if row is None else row[0]

    def fetch_df(self, name: str, params: Mapping[str, Any] | None = None) -> pd.DataFrame:
        raise NotImplementedError

    def fetch_arrow(self, name: str, params: Mapping[str, Any] | None = None) -> pa.Table:
        """The rows of a read statement as an Arrow table (list columns as Arrow lists)."""
        raise NotImplementedError

    def fetch_batches(self, name: str, params: Mapping[str, Any] | None = None, *,
                      batch_rows: int = WRITE_BATCH_ROWS) -> Iterator[pa.RecordBatch]:
        """The rows of a read statement as Arrow record batches of at most ``batch_rows`` rows, streamed
        from the sink (never the whole result at once)."""
        raise NotImplementedError

    @contextlib.contextmanager
    def transaction(self) -> Iterator[None]:
        raise NotImplementedError
        yield

    def insert_rows(self, dest: ResultsTable, rows: pa.Table | pads.Dataset, params: Mapping[str, Any]) -> None:
        """Run ``results_insert_<dest>`` over ``rows`` (visible to it as ``incoming``).

        ``rows``: an Arrow table, or a staged Parquet dataset (:func:`staged_rows`) that travels
        to the sink in batches of :data:`WRITE_BATCH_ROWS` rows, inside the caller's transaction.
        """
        with self.incoming(dest, rows):
            self.execute(f"results_insert_{dest.destination}", params)

    @contextlib.contextmanager
    def incoming(self, dest: ResultsTable, rows: pa.Table | pads.Dataset) -> Iterator[None]:
        """``rows`` (columns of ``dest``'s table; a table or a staged dataset) visible to statements as ``incoming`` (PostgreSQL: in a transaction)."""
        raise NotImplementedError
        yield

    def lock_partition(self, what: str, *, experiment_id: str, ds) -> None:
        """Inside a transaction: wait for other writers of the same (``what``, experiment, day)."""


def statement_for(name: str, dialect: str, schema: str, **identifiers: str) -> str:
    """:func:`counterbid.sql.statement` with ``schema`` filled in when the file has that placeholder."""
    text = load_sql(name, dialect) if has_dialect_file(name, dialect) else load_sql(name)
    ids = dict(identifiers)
    if "schema" in set(_PLACEHOLDER.findall(text)):
        ids.setdefault("schema", schema)
    return statement(name, dialect=dialect, **ids)


class DuckDBSession(ResultsSession):
    """A session on a DuckDB connection (the embedded results file)."""

    dialect = "duckdb"

    def execute(self, name, params=None, **identifiers):
        return self.con.execute(self.sql(name, **identifiers), dict(params or {}))

    def fetch_df(self, name, params=None):
        return self.execute(name, params).df()

    def fetch_arrow(self, name, params=None):
        return self.con.sql(self.sql(name), params=dict(params or {})).to_arrow_table()

    def fetch_batches(self, name, params=None, *, batch_rows=WRITE_BATCH_ROWS):
        cursor = self.con.cursor()  # a connection of its own: the stream does not hold this one's result
        try:
            yield from cursor.sql(self.sql(name), params=dict(params or {})).to_arrow_reader(int(batch_rows))
        finally:
            cursor.close()

    @contextlib.contextmanager
    def transaction(self):
        self.con.execute("begin transaction")
        try:
            yield
        except BaseException:
            self.con.execute("rollback")
            raise
        self.con.execute("commit")

    @contextlib.contextmanager
    def incoming(self, dest, rows):
        if isinstance(rows, pads.FileSystemDataset):  # staged Parquet: DuckDB's own reader, row group by row group
            self.con.read_parquet(list(rows.files)).create_view("incoming", replace=True)
            yield
            self.execute("results_drop_incoming_view")
            return
        self.con.register("incoming", rows)  # left registered on failure: the connection is closed
        yield
        self.con.unregister("incoming")


class PostgresSession(ResultsSession):
    """A session on a psycopg 3 connection (autocommit; :meth:`transaction` opens one)."""

    dialect = "postgres"

    def lock_partition(self, what, *, experiment_id, ds):
        # DuckDB needs no such lock: its file admits one writing process at a time
        self.execute("results_lock_partition", {"schema": self.schema, "what": what, "experiment_id": str(experiment_id),
                                                "ds": ds})

    def execute(self, name, params=None, **identifiers):
        return self.con.execute(self.sql(name, **identifiers), None if params is None else dict(params))

    def fetch_df(self, name, params=None):
        import pandas as pd

        cur = self.execute(name, params)
        frame = pd.DataFrame.from_records(cur.fetchall(), columns=[d.name for d in cur.description])
        return _like_duckdb(frame)

    def fetch_arrow(self, name, params=None):
        cur = self.execute(name, params)
        columns = list(zip(*cur.fetchall())) or [()] * len(cur.description)
        return pa.table({d.name: pa.array(list(values)) for d, values in zip(cur.description, columns)})

    def fetch_batches(self, name, params=None, *, batch_rows=WRITE_BATCH_ROWS):
        # a server-side cursor (in a transaction of its own): the server sends batch_rows rows at a time
        with self.con.transaction(), self.con.cursor(name=f"counterbid_stream_{uuid.uuid4().hex[:12]}") as cur:
            cur.execute(self.sql(name), None if params is None else dict(params))
            while rows := cur.fetchmany(int(batch_rows)):
                yield pa.RecordBatch.from_arrays([pa.array(list(c)) for c in zip(*rows)],
                                                 names=[d.name for d in cur.description])

    @contextlib.contextmanager
    def transaction(self):
        with self.con.transaction():
            yield

    @contextlib.contextmanager
    def incoming(self, dest, rows):
        self.execute("results_stage_incoming", table=dest.table)
        columns = [r[0] for r in self.execute("results_table_columns", {"schema": self.schema, "table": dest.table}).fetchall()]
        given = rows.column_names if isinstance(rows, pa.Table) else rows.schema.names
        missing = [c for c in columns if c not in given]
        if missing:
            raise InputError(f"{self.where}: rows for table {dest.table} lack column(s) {', '.join(missing)}")
        with self.con.cursor() as cur, cur.copy(self.sql("results_copy_incoming")) as copy:
            for batch in row_batches(rows):  # one batch's Python values at a time, never the whole day's
                for row in zip(*(batch.column(c).to_pylist() for c in columns)):
                    copy.write_row(row)
        yield
        self.execute("results_drop_incoming")


def _like_duckdb(frame: pd.DataFrame) -> pd.DataFrame:
    """Columns of date objects as ``datetime64`` and decimals as floats, as DuckDB's ``.df()`` gives them."""
    import decimal

    import pandas as pd

    for name in frame.columns:
        sample = frame[name].dropna()
        if sample.empty:
            continue
        first = sample.iloc[0]
        if isinstance(first, dt.date) and not isinstance(first, dt.datetime):
            frame[name] = pd.to_datetime(frame[name])
        elif isinstance(first, decimal.Decimal):
            frame[name] = frame[name].astype(float)
    return frame


def as_session(con, *, schema: str = "main") -> ResultsSession:
    """``con`` itself when it is a session, else a :class:`DuckDBSession` over a DuckDB connection."""
    if isinstance(con, ResultsSession):
        return con
    return DuckDBSession(con, schema=schema)


# -- versions and migrations ------------------------------------------------------------------
def schema_version(session: ResultsSession) -> int:
    """Version of the results schema (0: no results tables yet).

    A database written before versions were recorded has no ``counterbid_schema`` rows; its
    version is read from its columns (``results_unversioned_version``).
    """
    params = {"schema": session.schema, "table": "counterbid_schema"}
    if session.scalar("results_table_exists", params):
        recorded = session.scalar("results_schema_version")
        if recorded is not None:
            return int(recorded)
    return int(session.scalar("results_unversioned_version", {"schema": session.schema}))


def _newer(session: ResultsSession, version: int) -> InputError:
    return InputError(
        f"{session.where}: results schema version {version} was written by a newer counterbid (this one "
        f"knows versions up to {SCHEMA_VERSION}); upgrade counterbid, or point it at another results database")


def check_readable(session: ResultsSession) -> None:
    """Refuse a results database whose schema version is not this code's (0, empty, passes)."""
    version = schema_version(session)
    if version > SCHEMA_VERSION:
        raise _newer(session, version)
    if 0 < version < SCHEMA_VERSION:
        raise InputError(
            f"{session.where}: results schema version {version} is older than this counterbid's "
            f"{SCHEMA_VERSION}; the next write (the daily DAG or `counterbid backfill`) upgrades it in place")


def migrate(session: ResultsSession, *, now: dt.datetime | None = None) -> list[int]:
    """Bring the results schema to :data:`SCHEMA_VERSION` in one transaction.

    Parameters
    ----------
    session : ResultsSession
        A writable session, not inside a transaction.
    now : datetime, optional
        Time recorded with each applied step (default: now, UTC).

    Returns
    -------
    list of int
        Versions applied (empty when the schema was already current).

    Raises
    ------
    InputError
        The schema is newer than this code (never written to).
    """
    if _recorded_version(session) == SCHEMA_VERSION:
        return []
    stamp = now or dt.datetime.now(dt.timezone.utc)
    applied: list[int] = []
    with session.transaction():
        if session.dialect == "postgres":  # two writers migrating at once: the second waits, then sees it done
            session.execute("results_migration_lock", {"schema": session.schema})
        session.execute("results_create_schema")
        session.execute("results_create_schema_version")
        version = schema_version(session)
        if version > SCHEMA_VERSION:
            raise _newer(session, version)
        recorded = session.scalar("results_schema_version")
        if recorded is not None and int(recorded) == SCHEMA_VERSION:
            return []
        if recorded is None and version > 0:
            # written before versions were recorded: complete its first version's tables (step 1
            # only creates what is missing), then record the version its columns show
            for st in MIGRATIONS[0].statements:
                session.execute(st.name, **dict(st.identifiers))
            session.execute("results_record_version", {"version": version, "migrated_at": stamp})
        for view, _ in reversed(RESULTS_VIEWS):
            session.execute("results_drop_view", view=view)
        for step in MIGRATIONS:
            if step.version <= version:
                continue
            for st in step.statements:
                if st.dialects is None or session.dialect in st.dialects:
                    session.execute(st.name, **dict(st.identifiers))
            session.execute("results_record_version", {"version": step.version, "migrated_at": stamp})
            applied.append(step.version)
        for _, create in RESULTS_VIEWS:
            session.execute(create)
    return applied


def _recorded_version(session: ResultsSession) -> int | None:
    if not session.scalar("results_table_exists", {"schema": session.schema, "table": "counterbid_schema"}):
        return None
    recorded = session.scalar("results_schema_version")
    if recorded is not None and int(recorded) > SCHEMA_VERSION:
        raise _newer(session, int(recorded))
    return None if recorded is None else int(recorded)
