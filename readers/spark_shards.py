"""The Spark engine: Spark reads the bids, assigns the shards and estimates them in parallel.

The same work as :mod:`counterbid.readers.shards`, spread over a Spark cluster. Spark reads the
Parquet input itself (a path, a folder or an object-store URL its file system understands), gives
every bid the shard of its auction by the same stable hash as the local engine
(``sql/spark_bids_with_shard.spark.sql``; :func:`counterbid.estimators.shard_of`), puts each
shard in a partition of its own (no sort, no grouping in Spark) and runs one Python task per
partition (``mapInArrow``) that converts the shard's rows as the
local reader does (:func:`counterbid.readers.bid_log.bids_from_arrow`), validates them
(:func:`~counterbid.estimators.prepare_bids`) and returns its stratum pieces
(:func:`~counterbid.estimators.stratum_pieces`). Only the pieces travel back to the driver,
which combines them (:func:`~counterbid.estimators.combine_pieces`). Inside a shard the
rows keep the order the local engine reads them in (files by path, rows by position), so the
pieces, the numbers and the row named by an error are the local engine's.

What crosses the shuffle: the contract's columns only, the text labels ``arm`` and
``experiment_id`` as codes of the experiment's words (:mod:`.spark_label_codes`), decoded in the
shard's worker; an input of one file is ordered by its row alone (no file name per row).

Memory: a Python worker holds one shard (set by ``max_bids_per_shard``), of the contract's columns
only, plus a copy of it when the rows reach it out of read order (Spark's shuffle delivers them
in no set order: the worker puts them in read order by their key); the driver holds the pieces (a few
numbers per stratum) and, when clustering by bidder, the Gram forms of the bidders' sums
(:mod:`.spark_bidder_gram`); the DAG's estimate step has the executors store the per-bidder rows
themselves (``bidder_rows_sink``), so they never reach the driver.

Input the two engines read alike: a bad row is named by its shard and its row there, as locally;
a shard is named only when several hold bids; a bid without an auction id is refused by shard 0's
worker (its hash is null); columns of nanosecond timestamps (pandas' datetimes, which Spark
otherwise refuses to read) are read as integers (``spark.sql.legacy.parquet.nanosAsLong`` is set
on the session). Spark's and PySpark's logs of a failed task or query are silenced on the
session: the error itself reaches the caller, as one line when it is about the input.

Needs the ``spark`` extra (``pip install 'counterbid[spark]'``) and a Java runtime Spark supports
(17 or 21) on every machine that runs Spark; workers need counterbid installed in the Python
they run (``PYSPARK_PYTHON``).
"""

from __future__ import annotations

import os
import pickle
import re
import sys
import warnings
from collections.abc import Mapping
from contextlib import contextmanager
from urllib.parse import unquote

import pyarrow as pa

from counterbid.estimators import BID_COLUMNS, EstimatorWarning, Experiment, StratumPiece, n_shards, prepare_bids, stratum_pieces
from counterbid.estimators.bids import REQUIRED_BID_COLUMNS
from counterbid.estimators.errors import InputError, NothingToEstimate, no_pieces_error

from .shards import ShardPieces
from .spark_label_codes import coded_label_columns, decoded_labels, listed_words
from .spark_bidder_gram import BIDDER_COLUMNS, GRAM_COLUMNS, bidder_rows, bidder_table, combined_grams, partition_gram
from .shards import max_bids_per_shard as _max_bids_setting

__all__ = [
    "ENGINES",
    "EngineFailure",
    "SPARK_EXTRA",
    "SPARK_MASTER_ENV",
    "STATEMENT_PARAMETERS",
    "bid_log_pieces_on_spark",
    "lake_partition_pieces_on_spark",
    "require_pyspark",
    "spark_session",
    "spark_shard_pieces",
]

#: The engines of ``counterbid estimate --engine`` and of the DAG's estimate step.
ENGINES = ("local", "spark")
#: What to install for the Spark engine.
SPARK_EXTRA = "pip install 'counterbid[spark]'"
#: Environment variable naming the Spark master of sessions counterbid starts itself.
SPARK_MASTER_ENV = "COUNTERBID_SPARK_MASTER"
#: Temporary views the statements of ``sql/spark_*.sql`` read.
_BIDS_VIEW = "counterbid_bids"
_FILES_VIEW = "counterbid_bid_files"
#: Bits of the in-file row index in a bid's read-order key (file rank in the bits above).
_ROW_BITS = 40
#: Session setting under which Spark reads Parquet's nanosecond timestamps (pandas' datetimes) as integers.
_NANOS_AS_LONG = "spark.sql.legacy.parquet.nanosAsLong"
#: Columns of each shard's answer (one row), then of its per-bidder rows (:mod:`.spark_bidder_gram`).
_ANSWER = ("shard long, n_bids long, n_excluded long, single_bidders boolean, error string, warnings array<string>, "
           f"pieces binary, with_sums boolean, {BIDDER_COLUMNS}")
#: Columns of what reaches the driver: the answers, and one Gram row per partition of the bidder rows.
_COLLECTED = f"{_ANSWER}, {GRAM_COLUMNS}"


def require_pyspark():
    """The ``pyspark`` module, or one :class:`InputError` line saying what to install."""
    try:
        import pyspark  # noqa: F401
        from pyspark.sql import SparkSession  # noqa: F401
    except ImportError:
        raise InputError(f"the Spark engine needs PySpark, which is not installed here: {SPARK_EXTRA}") from None
    return pyspark


def spark_session(master: str | None = None, config: Mapping[str, str] | None = None):
    """The active Spark session, or a new one.

    Parameters
    ----------
    master : str, optional
        Master URL of a new session (``local[2]``, ``spark://host:7077``, ``yarn``, ...), or a
        Spark Connect URL (``sc://host:15002``, with ``/;token=...`` when the server asks for one:
        no Java is needed here then); default ``$COUNTERBID_SPARK_MASTER``, else ``local[*]``.
        Ignored when a session is active (a ``@task.pyspark`` task's, say).
    config : mapping, optional
        More Spark settings of a new session.

    Returns
    -------
    pyspark.sql.SparkSession

    Raises
    ------
    InputError
        PySpark not installed, or no Java runtime to start it with.
    """
    require_pyspark()
    from pyspark.sql import SparkSession

    active = SparkSession.getActiveSession()
    if active is not None:
        return active
    url = master or os.environ.get(SPARK_MASTER_ENV) or "local[*]"
    if url.startswith("sc://"):  # Spark Connect: the server runs Spark, Java and the Python workers
        builder = SparkSession.builder.remote(url)
        for key, value in (config or {}).items():
            builder = builder.config(key, value)
        try:
            with _quiet_pyspark():
                return builder.getOrCreate()
        except Exception as exc:  # grpc's errors: the server is down, refuses the token, ...
            first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
            raise InputError(f"could not reach the Spark Connect server {url.split(';')[0]} ({first})") from None
    _require_java()
    # local workers run this interpreter (which has counterbid), not whatever `python3` is first on PATH
    os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
    builder = (SparkSession.builder.master(url)
               .appName("counterbid").config("spark.ui.enabled", "false").config("spark.ui.showConsoleProgress", "false")
               .config("spark.driver.maxResultSize", "0"))  # pieces of every shard come back to the driver
    for key, value in {**_local_jvm_options(url, config or {}), **(config or {})}.items():
        builder = builder.config(key, value)
    try:
        with _quiet_pyspark():
            session = builder.getOrCreate()
        # Spark's own warnings and error logs (a failed task's Java stack) would bury counterbid's
        # one line on stderr; what went wrong reaches the caller as an exception
        session.sparkContext.setLogLevel("FATAL")
        return session
    except Exception as exc:  # py4j and pyspark raise their own types; Java missing is the usual cause
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InputError(f"could not start Spark ({first}); Spark needs a Java 17 or 21 runtime: set JAVA_HOME "
                         "to one") from None


#: The JVM's garbage collector of a local session counterbid starts: the throughput collector. In local
#: mode the driver's JVM runs the tasks; with G1 (Java's default) the engine took about 8-10 CPU s
#: more on 10M bids, for a JVM about 100-200 MiB smaller (``docs/scale.md``).
_LOCAL_GC = "-XX:+UseParallelGC"
#: Where a session's settings name the driver JVM's options.
_DRIVER_JAVA_OPTIONS = ("spark.driver.extraJavaOptions", "spark.driver.defaultJavaOptions")


def _local_jvm_options(url: str, config: Mapping[str, str]) -> dict[str, str]:
    """``spark.driver.defaultJavaOptions`` choosing :data:`_LOCAL_GC` for a ``local`` master, else nothing.

    Left out when the driver JVM's options already name a collector (two would stop it from
    starting) or its default options are set at all: in ``config``, in the ``spark-defaults.conf``
    Spark's launcher reads (``$SPARK_CONF_DIR``, else ``$SPARK_HOME/conf``) or in the variables
    every JVM reads (``JAVA_TOOL_OPTIONS``, ``JDK_JAVA_OPTIONS``, ``_JAVA_OPTIONS``).
    """
    if not (url == "local" or url.startswith("local[")):
        return {}
    given = {**_spark_defaults(), **config}
    chosen = " ".join([*(str(given.get(key, "")) for key in _DRIVER_JAVA_OPTIONS),
                       *(os.environ.get(name, "") for name in ("JAVA_TOOL_OPTIONS", "JDK_JAVA_OPTIONS", "_JAVA_OPTIONS"))])
    if re.search(r"-XX:[+-]Use[A-Za-z0-9]*GC\b", chosen) or given.get("spark.driver.defaultJavaOptions"):
        return {}
    return {"spark.driver.defaultJavaOptions": _LOCAL_GC}


def _spark_defaults() -> dict[str, str]:
    """The settings of the ``spark-defaults.conf`` Spark's launcher reads (none when there is no such file)."""
    folder = os.environ.get("SPARK_CONF_DIR") or (
        os.path.join(os.environ["SPARK_HOME"], "conf") if os.environ.get("SPARK_HOME") else None)
    if folder is None:
        try:
            import pyspark
        except ImportError:
            return {}
        folder = os.path.join(os.path.dirname(pyspark.__file__), "conf")
    found = {}
    try:
        with open(os.path.join(folder, "spark-defaults.conf")) as f:
            for line in f:
                pair = re.match(r"\s*([^\s=:#!][^\s=:]*)\s*[\s=:]?\s*(.*?)\s*$", line)  # key value, key=value
                if pair:
                    found[pair.group(1)] = pair.group(2)
    except OSError:
        return {}
    return found


def _require_java() -> None:
    """One line when there is no ``java`` to start Spark's driver with (before Spark's launch script complains)."""
    import shutil

    home = os.environ.get("JAVA_HOME")
    if home:
        if not os.access(os.path.join(home, "bin", "java"), os.X_OK):
            raise InputError(f"JAVA_HOME={home} holds no bin/java; Spark needs a Java 17 or 21 runtime: set JAVA_HOME "
                             "to one")
    elif shutil.which("java") is None:
        raise InputError("no Java runtime (JAVA_HOME is unset and no java on PATH); Spark needs a Java 17 or 21 "
                         "runtime: set JAVA_HOME to one")


#: Spark's error classes of an input it cannot read (on planning, when footers are read, or when a job runs).
_READ_FAILURES = re.compile(
    r"FAILED_READ_FILE|PATH_NOT_FOUND|CANNOT_READ_FILE_FOOTER|not a Parquet file|PARQUET_TYPE_ILLEGAL")
#: The line of a Spark error that names its class (``[FAILED_READ_FILE.CANNOT_READ_FILE_FOOTER] ...``).
_ERROR_CLASS_LINE = re.compile(r"(\[[A-Z][A-Z_.]*\][^\n]*)")


def _is_read_failure(exc: Exception) -> bool:
    """Whether ``exc`` (an ``AnalysisException`` or py4j's wrapper of a ``SparkException``) is about the input files."""
    from pyspark.sql.utils import AnalysisException

    return isinstance(exc, AnalysisException) or bool(_READ_FAILURES.search(str(exc)))


def _analysis_error(exc: Exception, source: str) -> InputError:
    """One line for Spark's error on reading ``source``: Spark's own classed line, without the Java stack."""
    text = str(exc).strip()
    if "PATH_NOT_FOUND" in text or "Path does not exist" in text:
        return InputError(f"{source}: no such file or folder")
    found = _ERROR_CLASS_LINE.search(text)
    first = found.group(1).strip() if found else (text.splitlines()[0] if text else type(exc).__name__)
    return InputError(f"{source}: not a readable Parquet file ({first})")


class EngineFailure(InputError):
    """The Spark engine failed (not the input): one line with the cause, printed as the command's error line."""


#: Causes of a failed Spark job, by what its error text holds, first match wins.
_CAUSES = (
    (re.compile(r"maxResultSize"), "the results exceed spark.driver.maxResultSize ({detail}); raise it, or 0 for no "
                                   "limit"),
    (re.compile(r"OutOfMemoryError|Java heap space|GC overhead limit"),
     "out of memory in Spark's JVM ({detail}); give the driver or executors more memory "
     "(spark.driver.memory, spark.executor.memory) or the shards fewer bids"),
    (re.compile(r"\bMemoryError\b|failed to map segment|Cannot allocate memory|bad_alloc|\[Errno 12\]"),
     "out of memory in a Python worker ({detail}); raise spark.executor.pyspark.memory or the executors' memory, "
     "or give the shards fewer bids"),
    (re.compile(r"ExecutorLostFailure|[Ll]ost executor|Python worker exited unexpectedly|"
                r"SparkContext was shut down|Connection reset"),
     "an executor or Python worker was lost ({detail}); run it again, and check the cluster's logs if it recurs"),
)
#: The line of Spark's error text that says what happened.
_DETAIL = re.compile(r"(java\.lang\.OutOfMemoryError[^\n]*|Total size of serialized results[^\n;]*|"
                     r"ExecutorLostFailure[^\n]*|Python worker exited unexpectedly[^\n]*|"
                     r"\[[A-Z][A-Z_.]*\][^\n]*)")


def engine_failure(exc: Exception, source: str) -> Exception:
    """One line for a failed Spark job: its cause (out of memory, a lost executor, ...) and Spark's own words.

    Errors of Spark and its Python workers (PySpark's and py4j's exception types) become an
    :class:`EngineFailure`; anything else is returned unchanged.
    """
    if not type(exc).__module__.startswith(("pyspark", "py4j")):
        return exc
    text = str(exc)
    lines = [line.strip() for line in text.strip().splitlines() if line.strip()]
    if "An exception was thrown from the Python worker" in text and lines:
        detail = lines[-1]  # the worker's own exception line, after its traceback
    else:
        found = _DETAIL.search(text)
        detail = found.group(1).strip() if found else (lines[0] if lines else type(exc).__name__)
    if len(detail) > 240:
        detail = detail[:237] + "..."
    for pattern, wording in _CAUSES:
        found = pattern.search(text)
        if found:
            if "An exception was thrown from the Python worker" not in text and _DETAIL.search(text) is None:
                # Spark's own line of the cause, not py4j's "An error occurred while calling ..."
                detail = next((line for line in lines if found.group(0) in line), detail)[:240]
            return EngineFailure(f"{source}: the Spark engine failed: " + wording.format(detail=detail))
    return EngineFailure(f"{source}: the Spark engine failed ({detail})")


def _as_engine_failure(exc: Exception, source: str) -> Exception:
    """What to raise for ``exc`` inside an ``except`` block: its :func:`engine_failure` line, else ``exc`` itself."""
    failure = engine_failure(exc, source)
    if failure is not exc:
        failure.__cause__, failure.__suppress_context__ = None, True
    return failure


def _quiet_query_loggers() -> None:
    """PySpark's loggers that print every SQL error with its Java stack as JSON on stderr, silenced.

    The error itself still reaches counterbid, which turns the ones about the input into one line.
    """
    import logging

    from pyspark.logger import PySparkLogger

    for name in ("SQLQueryContextLogger", "DataFrameQueryContextLogger"):
        PySparkLogger.getLogger(name).setLevel(logging.CRITICAL)


@contextmanager
def _quiet_pyspark():
    """PySpark's notice that it does not support this pandas yet, not shown (counterbid hands Spark Arrow, not pandas)."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="PySpark does not yet fully support pandas", category=FutureWarning)
        yield


#: Every statement the engine runs (``sql/<name>.spark.sql``) and the ``:name`` parameters it binds.
STATEMENT_PARAMETERS = {
    "spark_bids_with_shard": frozenset({"n_shards", "row_bits"}),
    "spark_bids_with_shard_one_file": frozenset({"n_shards"}),
    "spark_shard_partition_keys": frozenset({"candidates", "n_shards"}),
    "spark_lake_partition": frozenset({"ds", "experiment_id"}),
}


def _run_sql(spark, name: str, **args):
    """Spark's frame of the statement ``sql/<name>.spark.sql`` with ``args`` bound (exactly its parameters)."""
    from counterbid.sql import statement

    if set(args) != STATEMENT_PARAMETERS[name]:  # a programming error, not an input's
        raise ValueError(f"statement {name!r} binds {sorted(STATEMENT_PARAMETERS[name])}; got {sorted(args)}")
    text = statement(name, dialect="spark")
    return spark.sql(text, args=args) if args else spark.sql(text)


def _with_shards(spark, bids, *, shards: int, source: str):
    """``bids`` with its shard and read-order key, through ``sql/spark_bids_with_shard.spark.sql``.

    ``bids`` carries ``bid_file`` and ``bid_row`` (Spark's file metadata, added where the files
    are read). The read-order key ranks each row by its file's path, then by its row in the file:
    the order in which the local engine reads the same input (Arrow lists a folder's files by their
    whole path; DuckDB's glob of a split log does too while the files sit at one depth under
    folders whose names sort alike either way, the usual ``key=value/part-N`` layout). An input
    of one file needs no ranking: its key is the row (``sql/spark_bids_with_shard_one_file.spark.sql``,
    which neither reads the file's name per row nor joins on it).
    """
    try:
        # a staged day's shard=K folders give a `shard` column: recomputed here
        bids.drop("shard", "bid_order").createOrReplaceTempView(_BIDS_VIEW)
        ranked = _ranked_files(bids)
        if len({rank for _, rank in ranked}) == 1:
            sharded = _run_sql(spark, "spark_bids_with_shard_one_file", n_shards=int(shards))
            return sharded.drop("bid_file", "bid_row")
        spark.createDataFrame(ranked, "bid_file string, file_rank long").createOrReplaceTempView(_FILES_VIEW)
        sharded = _run_sql(spark, "spark_bids_with_shard", n_shards=int(shards), row_bits=_ROW_BITS)
        return sharded.drop("bid_file", "bid_row")
    except Exception as exc:  # AnalysisException of the statement, or py4j's wrapper of Spark's error
        if _is_read_failure(exc):
            raise _analysis_error(exc, source) from None
        raise _as_engine_failure(exc, source)


#: A URI of no authority as ``inputFiles()`` spells it (``file:///x``); Spark's file metadata spells it ``file:/x``.
_EMPTY_AUTHORITY = re.compile(r"^([A-Za-z][A-Za-z0-9+.-]*):///")


def _ranked_files(bids) -> list[tuple[str, int]]:
    """The files ``bids`` is read from, each ranked by its path, as ``(file, rank)`` rows.

    From the frame's own file listing (``inputFiles()``: no job, no row read), ranked by the path
    itself, as Arrow lists a folder (Spark's file names are URIs: a space is ``%20``). A file
    appears under both spellings of a URI of no authority (``file:///x`` and ``file:/x``, the
    latter being how ``_metadata.file_path`` names it), with one rank, so the join matches either.
    """
    files = sorted({_EMPTY_AUTHORITY.sub(r"\1:/", f) for f in bids.inputFiles()}, key=unquote)
    rows = []
    for rank, name in enumerate(files):
        rows.append((name, rank))
        other = re.sub(r"^([A-Za-z][A-Za-z0-9+.-]*):/(?!/)", r"\1:///", name)
        if other != name:
            rows.append((other, rank))
    return rows


def _footer_rows(bids) -> int | None:
    """Rows of the local Parquet files ``bids`` reads, added from their footers; ``None`` when a file is not local
    or its footer does not read (Spark counts them then)."""
    import pyarrow.parquet as pq
    from urllib.parse import urlparse

    total = 0
    for name in bids.inputFiles():
        uri = urlparse(name)
        if uri.scheme != "file":
            return None
        try:
            total += pq.read_metadata(unquote(uri.path)).num_rows
        except Exception:  # pyarrow cannot read a footer Spark could: Spark's count names the problem
            return None
    return total


#: Brackets the shard number in a worker's messages until the driver knows how many shards hold bids.
_SHARD_MARK = "\x1f"
_MARKED_SHARD = re.compile(f"{_SHARD_MARK}([0-9]+){_SHARD_MARK}")


def _shard_names(several: bool):
    """A worker's message as the local engine words it.

    ``<source> (shard K)`` when several shards hold bids, else ``<source>``.
    """
    return lambda text: _MARKED_SHARD.sub(r" (shard \1)" if several else "", text)


def _shard_answer(table: pa.Table, *, experiment: Experiment, cluster: str, day, source: str, multi: bool,
                  columns: list[str], sums_apart: bool = False, bidder_rows_sink=None, coded=None,
                  buckets: int = 1) -> pa.Table:
    """One shard, in a Spark worker: its rows in read order, validated and estimated; an error is an answer too.

    With ``sums_apart``, pieces that carry bidder sums travel without them and the shard's
    per-bidder totals follow the answer row, packed in one row per bidder bucket of ``buckets``
    (:func:`~.spark_bidder_gram.bidder_table`).
    With ``bidder_rows_sink`` too, the worker first hands the shard's pieces, with their bidder
    sums, to ``bidder_rows_sink(shard, pieces)`` (which stores them: the sums never reach the driver).
    """
    import pyarrow.compute as pc

    from .bid_log import bids_from_arrow

    shard = int(table.column("shard")[0].as_py())
    where = f"{source}{_SHARD_MARK}{shard}{_SHARD_MARK}" if multi else source  # named on the driver
    order = table.column("bid_order").to_numpy()
    if (order[1:] < order[:-1]).any():  # Spark grouped the rows by shard only: read order here (a copy)
        table = table.take(pc.sort_indices(table.column("bid_order")))
    del order
    if coded:
        table = decoded_labels(table, coded)
    n_bids = table.num_rows
    error, pieces, excluded, caught_messages, single_bidders = None, [], 0, [], False
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", EstimatorWarning)
            frame = bids_from_arrow(table.select(columns), columns, source=where)
            del table
            prepared = prepare_bids(frame, experiment, source=where)
            del frame
            excluded = int(prepared.n_excluded_auctions)
            pieces = stratum_pieces(prepared, experiment, shard=shard, day=day, cluster=cluster, source=where)
        caught_messages = [str(w.message) for w in caught if issubclass(w.category, EstimatorWarning)]
    except NothingToEstimate as exc:  # the driver decides: bad input alone, left out beside other shards
        excluded, single_bidders, error = exc.n_excluded_auctions, True, str(exc)
    except InputError as exc:
        error = str(exc)
    with_sums = bool(pieces) and all(p.bidder_sums is not None for p in pieces)
    schema = _answer_schema()
    per_bidder = []
    if sums_apart and with_sums and bidder_rows_sink is not None:
        bidder_rows_sink(shard, pieces)
    if sums_apart and with_sums:  # one set of rows per segment (one set when not segmented)
        for label in sorted({p.key.segment for p in pieces}, key=lambda v: (v is not None, v or "")):
            ids, unit, sums = bidder_rows([p for p in pieces if p.key.segment == label])
            per_bidder.append(bidder_table(ids, unit, sums, shard, schema, segment=label, buckets=buckets))
        pieces = [p.without_bidder_sums() for p in pieces]
    answer = pa.table({
        "shard": pa.array([shard], pa.int64()), "n_bids": pa.array([n_bids], pa.int64()),
        "n_excluded": pa.array([excluded], pa.int64()), "single_bidders": pa.array([single_bidders], pa.bool_()),
        "error": pa.array([error], pa.string()),
        "warnings": pa.array([caught_messages], pa.list_(pa.string())),
        "pieces": pa.array([pickle.dumps(pieces, protocol=pickle.HIGHEST_PROTOCOL)], pa.binary()),
        "with_sums": pa.array([with_sums], pa.bool_()),
        "bidder_bucket": pa.nulls(1, pa.int32()), "bidder_segment": pa.nulls(1, pa.string()),
        "bidder_unit": pa.nulls(1, pa.int32()), "bidder_keys": pa.nulls(1, pa.binary()),
        "bidder_sums": pa.nulls(1, pa.binary()),
    }, schema=schema)
    return pa.concat_tables([answer, *per_bidder]) if per_bidder else answer


def _partition_answers(batches, one_shard):
    """The answers of the shards in one partition of the bids (one shard, but any number is answered alike).

    ``batches`` are the partition's Arrow record batches; every shard among them is answered by
    ``one_shard`` (its rows in the order they arrived), shards by number.
    """
    import pyarrow.compute as pc

    batches = [b for b in batches if b.num_rows]
    if not batches:
        return
    table = pa.Table.from_batches(batches)
    del batches
    found = pc.unique(table.column("shard")).to_pylist()
    if len(found) == 1:  # the usual case: the partition is the shard
        held = [table]
        del table
        yield from one_shard(held.pop()).to_batches()
        return
    for shard in sorted(found):
        yield from one_shard(table.filter(pc.equal(table.column("shard"), shard))).to_batches()


#: Keys searched per partition for each partition's key (a partition left without one has a chance
#: of about ``n * exp(-64)``; its shards then share partitions, which the workers answer alike).
_KEYS_PER_PARTITION = 64
#: Each number of partitions' keys, once found (by partition).
_PARTITION_KEYS: dict[int, dict[int, int]] = {}


def _partition_key(spark, shards: int, column: str = "shard"):
    """The column that puts each value ``k`` of ``column`` in partition ``k`` under ``repartition(shards, key)``.

    Spark's hash repartition by the shard itself would put two shards in one partition and leave
    another empty about as often as not (``pmod(hash(shard), n)`` is no permutation); keyed by
    ``sql/spark_shard_partition_keys.spark.sql``'s key of partition ``k``, shard ``k``'s rows go to
    partition ``k``. Falls back to ``column`` itself when some partition has no key. The Gram step
    places the bidder buckets the same way (``column="bidder_bucket"``). A null value (an answer
    row of the Gram step) goes to one partition, whichever.
    """
    from pyspark.sql import functions as F

    keys = _PARTITION_KEYS.get(int(shards))
    if keys is None:  # Spark's hash is fixed (Murmur3, seed 42): the same keys in every session
        rows = _run_sql(spark, "spark_shard_partition_keys", n_shards=int(shards),
                        candidates=_KEYS_PER_PARTITION * int(shards)).collect()
        keys = _PARTITION_KEYS[int(shards)] = {int(r["shard"]): int(r["partition_key"]) for r in rows}
    if len(keys) < int(shards):
        return F.col(column)
    table = F.array(*[F.lit(keys[k]).cast("bigint") for k in range(int(shards))])
    return F.element_at(table, F.col(column).cast("int") + 1)


#: Input splits per task thread of the session (``spark.sql.files.minPartitionNum``, while the engine's
#: job runs): Spark's default, one split per 128 MiB, gives a 367 MiB file 3 tasks on 2 threads, the
#: third alone; smaller splits let the threads finish the read together.
_SPLITS_PER_THREAD = 4
#: The session's setting of the smallest number of input splits.
_MIN_SPLITS = "spark.sql.files.minPartitionNum"


@contextmanager
def _input_splits(spark):
    """The session set to split the input into :data:`_SPLITS_PER_THREAD` splits per task thread (at least),
    its own setting back afterwards.

    A hint: Spark still splits no finer than ``spark.sql.files.openCostInBytes`` (4 MiB) and no
    coarser than ``spark.sql.files.maxPartitionBytes``; a setting the session already has is kept.
    Spark Connect sessions are left as they are.
    """
    if not hasattr(spark, "_jsparkSession") or spark.conf.get(_MIN_SPLITS, None) not in (None, ""):
        yield
        return
    spark.conf.set(_MIN_SPLITS, str(_SPLITS_PER_THREAD * max(1, int(spark.sparkContext.defaultParallelism))))
    try:
        yield
    finally:
        spark.conf.unset(_MIN_SPLITS)


def _answer_schema(with_gram: bool = False) -> pa.Schema:
    """Arrow schema of :data:`_ANSWER` (with ``with_gram``: of :data:`_COLLECTED`), built without a Spark session."""
    fields = [("shard", pa.int64()), ("n_bids", pa.int64()), ("n_excluded", pa.int64()),
              ("single_bidders", pa.bool_()), ("error", pa.string()), ("warnings", pa.list_(pa.string())),
              ("pieces", pa.binary()), ("with_sums", pa.bool_()), ("bidder_bucket", pa.int32()),
              ("bidder_segment", pa.string()), ("bidder_unit", pa.int32()), ("bidder_keys", pa.binary()),
              ("bidder_sums", pa.binary())]
    if with_gram:
        fields += [("part_segment", pa.string()), ("part_bidders", pa.int64()), ("part_unit", pa.int32()),
                   ("part_gram", pa.list_(pa.float64()))]
    return pa.schema(fields)


def spark_shard_pieces(spark, bids, experiment: Experiment, *, shards: int, cluster: str = "auto", day=None,
                       source: str = "bids", bidder_gram: bool = True, expected_bids: int | None = None,
                       bidder_rows_sink=None) -> ShardPieces:
    """Estimate every shard of a Spark frame of bids in parallel; the pieces, on the driver.

    Parameters
    ----------
    spark : pyspark.sql.SparkSession
    bids : pyspark.sql.DataFrame
        Bids read from Parquet files (Spark's ``_metadata`` columns give the read order), with
        the columns of the bids data contract.
    experiment : Experiment
        With measured position weights already filled.
    shards : int
        Number of shards (:func:`~counterbid.estimators.n_shards`); rows go to shard
        :func:`~counterbid.estimators.shard_of` of their auction id.
    cluster : {'auto', 'auction', 'bidder'}
    day : date-like, optional
        Recorded in every piece.
    source : str
        Name of the input in messages; a shard of several is ``"<source> (shard K)"``, as locally.
    bidder_gram : bool, optional
        Default True: bidder sums are added per bidder on the executors and only their Gram form
        reaches the driver (:mod:`.spark_bidder_gram`); the pieces come back without bidder
        sums. False: the pieces keep their bidder sums (every shard's, on the driver).
    expected_bids : int, optional
        Rows of ``bids``: the shards' answers must account for every one of them.
    bidder_rows_sink : callable, optional
        With ``bidder_gram``: called in the worker of each shard whose pieces carry bidder sums,
        as ``bidder_rows_sink(shard, pieces)``, before they travel without them; it must be
        picklable and store what it needs where the caller can read it (a folder every executor sees).

    Returns
    -------
    ShardPieces
        As :func:`counterbid.readers.shards.pieces_by_shard`: the pieces by shard, then number of
        bidders, and the single-bidder auctions left out; with ``bidder_gram``, the bidder
        window of the input (``gram``; ``None`` when some shard's pieces carry no bidder sums,
        which combine by auction as the local engine's do) and, for a segmented experiment, each
        segment's (``segment_grams``).

    Raises
    ------
    InputError
        The first shard's error (by shard number), the line the local engine gives for that shard.
    EngineFailure
        Spark failed (out of memory, a lost executor, a result above ``spark.driver.maxResultSize``):
        one line with the cause.
    """
    columns = [c for c in ["experiment_id", *BID_COLUMNS, *experiment.auction_columns]
               if c in bids.columns]
    if "auction_id" not in columns:  # the shards need it: prepare_bids's line, before any statement names it
        raise InputError(f"{source}: column 'auction_id' is missing (required: {', '.join(REQUIRED_BID_COLUMNS)})")
    sharded = _with_shards(spark, bids, shards=shards, source=source)
    multi = shards > 1
    # the text labels (arm, experiment id) cross the shuffle as codes of the experiment's words
    selected, coded = coded_label_columns(sharded, columns, listed_words(experiment))

    def one_shard(table: pa.Table) -> pa.Table:  # runs in a Python worker, once per shard
        return _shard_answer(table, experiment=experiment, cluster=cluster, day=day, source=source, multi=multi,
                             columns=columns, sums_apart=bidder_gram, bidder_rows_sink=bidder_rows_sink, coded=coded,
                             buckets=int(shards))

    collected = _answer_schema(with_gram=True)  # on the driver: the workers receive it with the function

    def one_partition(batches):  # runs in a Python worker, once per partition of the bidder rows
        return partition_gram(batches, collected)

    def one_partition_of_bids(batches):  # runs in a Python worker, once per partition: its shard(s)
        return _partition_answers(batches, one_shard)

    try:
        # one task per shard, each shard in a partition of its own (_partition_key): no sort and no
        # grouping in Spark; the shard's task puts its rows in read order by their key (_shard_answer)
        # only the columns the estimate reads travel (as the local reader reads only those)
        parts = sharded.select(*selected, "shard", "bid_order").repartition(int(shards), _partition_key(spark, shards))
        with _quiet_pyspark(), _input_splits(spark):
            out = parts.mapInArrow(one_partition_of_bids, _ANSWER)
            if bidder_gram:  # bucket k's rows (all of its bidders') in partition k: one Gram row each to the driver
                out = out.repartition(int(shards), _partition_key(spark, shards, "bidder_bucket"))
                out = out.mapInArrow(one_partition, _COLLECTED)
            rows = _collect(out)
    except Exception as exc:  # a file Spark cannot read shows up only when the job runs
        if _READ_FAILURES.search(str(exc)):
            raise _analysis_error(exc, source) from None
        raise _as_engine_failure(exc, source)
    answers = sorted((r for r in rows if r["n_bids"] is not None), key=lambda r: r["shard"])
    parts = [(r["part_segment"], r["part_bidders"], r["part_unit"], r["part_gram"]) for r in rows
             if bidder_gram and r["part_bidders"] is not None]
    del rows
    if expected_bids is not None and sum(int(a["n_bids"]) for a in answers) != int(expected_bids):
        raise EngineFailure(f"{source}: the Spark engine returned the answers of {sum(int(a['n_bids']) for a in answers)} "
                            f"of {expected_bids} bids (a task's result was lost); run it again, with more driver "
                            "memory if it recurs")
    if not answers:  # a non-empty input gives every shard an answer: none arrived, so the results were lost
        raise EngineFailure(f"{source}: the Spark engine returned no shard's answer (the results were lost on the way "
                            "to the driver); run it again, with more driver memory if it recurs")
    # as locally, a shard is named only when more than one shard holds bids (which only the answers tell)
    named = _shard_names(len(answers) > 1)
    for answer in answers:
        if answer["error"] is not None and not (answer["single_bidders"] and len(answers) > 1):
            raise InputError(named(answer["error"]))
    pieces: list[StratumPiece] = []
    excluded = 0
    every_sum = True  # every shard that has pieces sent its bidder sums
    for answer in answers:
        for message in answer["warnings"] or []:
            warnings.warn(named(message), EstimatorWarning, stacklevel=2)
        excluded += int(answer["n_excluded"])
        mine = pickle.loads(answer["pieces"])
        every_sum = every_sum and (not mine or bool(answer["with_sums"]))
        pieces += mine
    if not pieces:  # as locally: several shards of single-bidder auctions only, or no bids at all
        raise no_pieces_error(source, experiment.id, single_bidders=any(a["single_bidders"] for a in answers),
                              n_excluded_auctions=excluded)
    if not (bidder_gram and every_sum):
        return ShardPieces(pieces, excluded, int(shards))
    units = {None: max(p.bid_exponent for p in pieces)}
    for p in pieces:  # each segment's form in the unit of its own pieces (combine_pieces rescales it)
        if p.key.segment is not None:
            units[p.key.segment] = max(units.get(p.key.segment, p.bid_exponent), p.bid_exponent)
    grams = combined_grams(parts, len(pieces[0].sum_labels), units)
    return ShardPieces(pieces, excluded, int(shards), gram=grams.pop(None), segment_grams=grams or None)


def _collect(frame) -> list:
    """``frame.collect()``, and the error of the driver's thread that served the rows, if it failed.

    PySpark's ``collect`` reads the rows from a socket that a driver thread fills; when that
    thread fails (``java.lang.OutOfMemoryError`` while serializing them, say) the socket just
    closes and ``collect`` returns the rows read so far. Asking the thread for its result raises
    its error instead (as PySpark's own Arrow collection does). Spark Connect frames collect as usual.
    """
    if not hasattr(frame, "_jdf"):
        return frame.collect()
    from pyspark.serializers import BatchedSerializer, CPickleSerializer
    from pyspark.traceback_utils import SCCallSiteSync
    from pyspark.util import _load_from_socket

    with SCCallSiteSync(frame.sparkSession.sparkContext):
        sock_info = frame._jdf.collectToPython()
    with _load_from_socket(sock_info, BatchedSerializer(CPickleSerializer())) as stream:
        rows = list(stream)
    if len(sock_info) > 2:
        sock_info[2].getResult()  # raises the serving thread's error (py4j's wrapper of it)
    return rows


def _read_parquet(spark, path: str, *, source: str, view: str, base_path: str | None = None):
    """Spark's frame of the Parquet files under ``path``, registered as the temporary view ``view``.

    With ``base_path`` (a folder above ``path``), the ``key=value`` folders between the two are
    columns too, and only the files under ``path`` are listed and their footers read.

    Each row carries ``bid_file`` and ``bid_row``, the file it came from and its row in that file
    (Spark's ``_metadata`` of a file source, which a view no longer exposes): the read order the
    local engine sees.
    """
    _quiet_query_loggers()
    # pandas writes datetimes as nanosecond timestamps, which Spark refuses to read at all; as
    # integers they read (the estimate never reads such a column: the local reader skips it too)
    spark.conf.set(_NANOS_AS_LONG, "true")
    try:
        reader = spark.read.option("mergeSchema", "true")
        frame = (reader if base_path is None else reader.option("basePath", base_path)).parquet(path)
        frame = frame.select("*", frame["_metadata.file_path"].alias("bid_file"),
                             frame["_metadata.row_index"].alias("bid_row"))
    except Exception as exc:  # AnalysisException, or py4j's wrapper of Spark's error reading a footer
        if _is_read_failure(exc):
            raise _analysis_error(exc, source) from None
        raise _as_engine_failure(exc, source)
    frame.createOrReplaceTempView(view)
    return frame


def bid_log_pieces_on_spark(spark, path: str, experiment: Experiment, *, max_bids_per_shard: int | None = None,
                            cluster: str = "auto") -> ShardPieces:
    """The pieces of a bid log estimated on Spark (``counterbid estimate --engine spark``; see
    :class:`counterbid.readers.engines.SparkEngine`).

    Parameters
    ----------
    spark : pyspark.sql.SparkSession
    path : str
        A Parquet file or (Hive-partitioned) folder, local or on any file system Spark reads.
    experiment : Experiment
    max_bids_per_shard : int, optional
        As for the local engine: the log's ``ceil(rows / max)`` shards are the same shards.
    cluster : {'auto', 'auction', 'bidder'}

    Returns
    -------
    ShardPieces
        The local engine's pieces for the same input, and the number of shards.
    """
    source = str(path)
    bids = _read_parquet(spark, source, source=source, view="counterbid_bid_log")
    try:  # the footers' row counts when the files are local: no Spark job
        rows = _footer_rows(bids)
        rows = bids.count() if rows is None else rows
    except Exception as exc:  # a footer Spark could list but not read
        if _READ_FAILURES.search(str(exc)):
            raise _analysis_error(exc, source) from None
        raise _as_engine_failure(exc, source)
    if rows == 0:
        raise InputError(f"{source}: holds no bids (0 rows)")
    shards = n_shards(rows, _max_bids_setting(max_bids_per_shard))
    return spark_shard_pieces(spark, bids, experiment, shards=shards, cluster=cluster, source=source,
                              expected_bids=rows)


def lake_partition_pieces_on_spark(spark, lake_root: str, *, experiment: Experiment, ds, shards: int,
                                   cluster: str = "auto", source: str | None = None,
                                   bidder_rows_sink=None) -> ShardPieces:
    """The pieces of one (experiment, day) of the Hive-partitioned bid lake, estimated on Spark.

    Spark reads the day's files under ``lake_root`` itself (only the ``ds=<day>`` folder is listed)
    and keeps the experiment's rows (``sql/spark_lake_partition.spark.sql``), in the shards the load step
    split the day into.

    Parameters
    ----------
    spark : pyspark.sql.SparkSession
    lake_root : str
        Root of the lake (``ds=YYYY-MM-DD`` folders), a path or an object-store URL.
    experiment : Experiment
    ds : datetime.date
    shards : int
        The day's number of shards (the load step's).
    cluster : {'auto', 'auction', 'bidder'}
    source : str, optional
        Name of the partition in messages (default ``"<lake_root> ds=<day>"``).
    bidder_rows_sink : callable, optional
        Where each shard's worker stores its pieces' bidder sums (see :func:`spark_shard_pieces`):
        the pieces then come back without them, with the day's bidder forms (``gram``,
        ``segment_grams``). Without it the pieces keep their bidder sums (every shard's, on the driver).

    Returns
    -------
    ShardPieces
    """
    source = source or f"{lake_root} ds={ds}"
    day = lake_day_frame(spark, lake_root, experiment=experiment, ds=ds, source=source)
    return spark_shard_pieces(spark, day, experiment, shards=shards, cluster=cluster, day=ds, source=source,
                              bidder_gram=bidder_rows_sink is not None, bidder_rows_sink=bidder_rows_sink)


def lake_day_frame(spark, lake_root: str, *, experiment: Experiment, ds, source: str):
    """One experiment's day of the Hive-partitioned lake as a Spark DataFrame (not collected).

    Spark lists only the ``ds=<day>`` folder under ``lake_root`` (a lake of many days is neither
    listed nor its footers read) and keeps the experiment's rows (``sql/spark_lake_partition.spark.sql``,
    with the ``bid_file`` and ``bid_row`` columns of the read order).

    Raises
    ------
    InputError
        The day's folder is missing or unreadable, or the lake has no ``experiment_id`` column.
    """
    from pyspark.sql.utils import AnalysisException

    root = str(lake_root).rstrip("/")
    try:
        lake = _read_parquet(spark, f"{root}/ds={ds}", base_path=root, source=source, view="counterbid_lake")
    except InputError as exc:
        if str(exc).endswith(": no such file or folder"):
            raise InputError(f"{lake_root}: partition ds={ds} is missing (no such folder)") from None
        raise
    if "ds" not in lake.columns or "experiment_id" not in lake.columns:
        raise InputError(f"{lake_root}: the bid lake needs ds=YYYY-MM-DD folders and an 'experiment_id' column")
    try:
        return _run_sql(spark, "spark_lake_partition", ds=ds, experiment_id=experiment.id)
    except AnalysisException as exc:
        raise _analysis_error(exc, source) from None
