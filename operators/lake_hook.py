"""The lake hook: reads of the bid lake, the click log and the staging folder on in-memory DuckDB.

Whatever the results sink is (a DuckDB file or PostgreSQL, :mod:`counterbid.operators.hooks`),
Parquet is read here, by a private in-memory DuckDB connection, with every statement in DuckDB's
own dialect. Nothing here opens the results database.
"""

from __future__ import annotations

import contextlib
import datetime as dt
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

import duckdb
import pandas as pd
import pyarrow as pa
from airflow.sdk import BaseHook

from counterbid.estimators.errors import InputError
from counterbid.sql import statement

__all__ = ["LakeHook", "lake_glob"]


def lake_glob(root: str | Path) -> str:
    """Glob of every Parquet file under a Hive-partitioned root (local path or object-store URL)."""
    text = str(root).rstrip("/")
    if not text:
        raise InputError("lake root is empty")
    return f"{text}/**/*.parquet"


class LakeHook(BaseHook):
    """In-memory DuckDB reads of the bid lake, the click log and the staged files.

    Parameters
    ----------
    config : mapping, optional
        DuckDB settings of every connection this hook opens (e.g. ``threads``, ``memory_limit``).

    Notes
    -----
    Each read opens its own ``duckdb.connect(':memory:')`` and closes it; object-store URLs
    (``s3://``, ``gs://``, ``https://``) are read through DuckDB's httpfs extension, which DuckDB
    loads automatically. Statements are ``sql/<name>.sql`` in DuckDB's dialect
    (:func:`counterbid.sql.statement` with ``dialect='duckdb'``), never the results sink's.
    """

    hook_name = "counterbid lake (in-memory DuckDB)"

    def __init__(self, *, config: Mapping[str, Any] | None = None) -> None:
        super().__init__()
        self.config = dict(config or {})

    @staticmethod
    def sql(name: str, **identifiers: str) -> str:
        """Statement ``name`` in DuckDB's dialect (the only one the lake connection speaks)."""
        return statement(name, dialect="duckdb", **identifiers)

    @contextlib.contextmanager
    def connect(self, *, config: Mapping[str, Any] | None = None) -> Iterator[duckdb.DuckDBPyConnection]:
        """A private in-memory connection; ``config`` adds DuckDB settings to the hook's."""
        con = duckdb.connect(":memory:", config={**self.config, **dict(config or {})})
        try:
            yield con
        finally:
            con.close()

    # -- the bid lake -------------------------------------------------------------------------
    def read_lake_partition(self, lake_root: str | Path, *, experiment_id: str, ds: dt.date) -> pa.Table:
        """Bids of one experiment and day (partition-pruned read of ``lake_root``)."""
        with self.lake_partition_batches(lake_root, experiment_id=experiment_id, ds=ds) as batches:
            return batches.read_all()

    def read_lake_range(self, lake_root: str | Path, *, experiment_id: str, first_ds: dt.date, ds: dt.date) -> pa.Table:
        """Bids of one experiment on every day ``first_ds..ds`` (partition-pruned)."""
        with self.lake_range_batches(lake_root, experiment_id=experiment_id, first_ds=first_ds, ds=ds) as batches:
            return batches.read_all()

    def lake_partition_batches(self, lake_root: str | Path, *, experiment_id: str, ds: dt.date,
                               batch_rows: int = 2**20) -> contextlib.AbstractContextManager[pa.RecordBatchReader]:
        """:meth:`read_lake_partition` as a stream of record batches (see :meth:`lake_range_batches`)."""
        params = {"lake_glob": lake_glob(lake_root), "ds": ds, "experiment_id": experiment_id}
        return self._batches("lake_read_partition", params, lake_root, batch_rows)

    def lake_range_batches(self, lake_root: str | Path, *, experiment_id: str, first_ds: dt.date, ds: dt.date,
                           batch_rows: int = 2**20) -> contextlib.AbstractContextManager[pa.RecordBatchReader]:
        """:meth:`read_lake_range` as a stream of record batches (memory: about one batch).

        The connection stays open while the ``with`` block iterates; lake errors raised during
        the iteration become the same one-line :class:`InputError` as :meth:`read_lake_range`'s.
        """
        params = {"lake_glob": lake_glob(lake_root), "first_ds": first_ds, "ds": ds, "experiment_id": experiment_id}
        return self._batches("lake_read_range", params, lake_root, batch_rows)

    def lake_partition_shard_batches(self, lake_root: str | Path, *, experiment_id: str, ds: dt.date, n_shards: int,
                                     batch_rows: int = 2**20) -> contextlib.AbstractContextManager[pa.RecordBatchReader]:
        """:meth:`lake_partition_batches` with a trailing ``shard`` column (stable hash of the auction id)."""
        from counterbid.readers.shards import SHARD_SCAN_CONFIG

        params = {"lake_glob": lake_glob(lake_root), "ds": ds, "experiment_id": experiment_id, "n_shards": int(n_shards)}
        return self._batches("lake_read_partition_shards", params, lake_root, batch_rows, config=SHARD_SCAN_CONFIG)

    def lake_count_partition(self, lake_root: str | Path, *, experiment_id: str, ds: dt.date) -> int:
        """Bids of one experiment and day in the lake (partition-pruned)."""
        params = {"lake_glob": lake_glob(lake_root), "ds": ds, "experiment_id": experiment_id}
        return int(self._query("lake_count_partition", params, lake_root).column(0)[0].as_py())

    def clicks_position_weights(
        self, clicks_root: str | Path, *, experiment_id: str, first_ds: dt.date, ds: dt.date
    ) -> pd.DataFrame:
        """Clicks, impressions and their ratio per (arm, position) over ``first_ds..ds``."""
        params = {"clicks_glob": lake_glob(clicks_root), "first_ds": first_ds, "ds": ds, "experiment_id": experiment_id}
        return self._query("clicks_position_weights", params, clicks_root).to_pandas()

    # -- staged files -------------------------------------------------------------------------
    def staged_columns(self, path: str | Path) -> dict[str, str]:
        """Column name -> DuckDB type of a Parquet file (footer only)."""
        with self.connect() as con:
            return dict(con.execute(self.sql("staged_columns"), {"path": str(path)}).fetchall())

    def staged_null_counts(self, path: str | Path) -> dict[str, int]:
        """Nulls per always-required contract column of a staged bids file."""
        with self.connect() as con:
            cur = con.execute(self.sql("staged_null_counts"), {"path": str(path)})
            names = [d[0] for d in cur.description]
            return dict(zip(names, (int(v) for v in cur.fetchone())))

    def staged_integer_range(self, path: str | Path, column: str) -> tuple[int, str | None]:
        """Rows of a staged bids file whose integer ``column`` lies outside int64, and the smallest such value."""
        from counterbid.estimators.bid_contract import INTEGER_RANGE

        low, high = INTEGER_RANGE
        with self.connect() as con:
            params = {"path": str(path), "low": low, "high": high}
            outside, example = con.execute(self.sql("staged_integer_range", column=column), params).fetchone()
            return int(outside), example

    def staged_quality_faults(self, path: str | Path) -> tuple[int, int | None, str | None, str | None]:
        """Rows of a staged file whose ``quality`` is missing or not > 0, and the first one (row, auction, value)."""
        with self.connect() as con:
            n, row, auction, quality = con.execute(self.sql("staged_quality_faults"), {"path": str(path)}).fetchone()
            return int(n), None if row is None else int(row), auction, quality

    def staged_arm_counts(self, path: str | Path) -> pd.DataFrame:
        """Auctions and bids per arm of a staged bids file."""
        with self.connect() as con:
            return con.execute(self.sql("staged_arm_counts"), {"path": str(path)}).df()

    @contextlib.contextmanager
    def staged_relations(self, *, day: str | Path, sample: str | Path | None = None) -> Iterator[duckdb.DuckDBPyConnection]:
        """In-memory connection with the temp table ``staged_day`` (``day``: a file or a glob of the shards).

        With ``sample`` (one shard's file or glob), also the temp table ``staged_sample``.
        """
        with self.connect() as con:
            con.execute(self.sql("staged_create_day"), {"path": str(day)})
            if sample is not None:
                con.execute(self.sql("staged_create_sample"), {"path": str(sample)})
            yield con

    def staged_shard_has_auctions(self, path: str | Path) -> bool:
        """Whether a staged shard (a file or a glob) holds an auction with at least two bids."""
        with self.connect() as con:
            return bool(con.execute(self.sql("staged_shard_has_auctions"), {"path": str(path)}).fetchone()[0])

    # -- helpers ------------------------------------------------------------------------------
    @contextlib.contextmanager
    def _batches(self, name: str, params: Mapping[str, Any], root, batch_rows: int,
                 config: Mapping[str, Any] | None = None) -> Iterator[pa.RecordBatchReader]:
        with self.connect(config=config) as con:
            try:
                yield con.sql(self.sql(name), params=dict(params)).to_arrow_reader(batch_rows)
            except (duckdb.IOException, duckdb.InvalidInputException) as exc:
                raise _lake_error(exc, root) from None

    def _query(self, name: str, params: Mapping[str, Any], root) -> pa.Table:
        with self.connect() as con:
            try:
                return con.sql(self.sql(name), params=dict(params)).to_arrow_table()
            except (duckdb.IOException, duckdb.InvalidInputException) as exc:
                raise _lake_error(exc, root) from None
            except duckdb.BinderException as exc:
                first = str(exc).splitlines()[0]
                raise InputError(f"{root}: cannot read the lake with statement {name!r} ({first})") from None


def _lake_error(exc: Exception, root) -> InputError:
    """One line naming the lake root for a DuckDB read error."""
    if "No files found" in str(exc):
        return InputError(f"{root}: no Parquet files under this root")
    first = str(exc).splitlines()[0]
    return InputError(f"{root}: a Parquet file of the lake cannot be read ({first})")
