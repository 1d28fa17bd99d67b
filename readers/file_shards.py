"""A one-file bid log split into shard files with the md5 rule computed once per auction, not per bid.

:func:`~counterbid.readers.shards.staged_bid_log_shards` lets DuckDB compute every row's shard
(``sql/bid_log_read_shards.sql``: the md5 of the auction id of each *bid*) and streams the rows into
the shard files. For a single Parquet file whose auction ids are integers, or text written auction by
auction, :func:`split_by_auction` gives the same files another way:

* the ``auction_id`` column alone is read first; ids written auction by auction are numbered by
  their runs (:func:`~counterbid.readers.identity_keys.auction_runs`), other integer ids in order of
  first appearance (:func:`~counterbid.readers.memory_shards.factorized_in_order`), and the md5 rule
  is computed once per distinct id (``sql/bid_log_shard_of_distinct_ids.sql``) and mapped to the rows;
* the log is then streamed batch by batch, each batch's rows put in shard order (a stable sort of the
  batch's shard numbers, so every shard keeps the log's row order) and each shard's slice written to
  its file: one take per batch rather than one filter per shard.

The files hold what DuckDB's route writes: its Arrow schema (asked of the same statement on no
rows), taken only where it holds the file's own values (the same type, or text with other offsets),
so everything downstream reads the same rows. Anything else -- a folder, a column DuckDB converts, a
null or recurring text auction id, an unreadable file -- returns ``False`` and the caller takes
DuckDB's route, whose messages name the fault.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pyarrow as pa

__all__ = ["split_by_auction"]

#: Rows per batch of the stream (one batch of the log in memory, plus its copy in shard order).
SPLIT_BATCH_ROWS = 2**20


def _duckdb_schema(path: Path, n_shards: int) -> pa.Schema:
    """The columns DuckDB's route writes (``sql/bid_log_read_shards.sql`` without its ``shard``), from no rows."""
    import duckdb

    from counterbid.sql import load_sql

    from .shards import SHARD_SCAN_CONFIG

    con = duckdb.connect(config=SHARD_SCAN_CONFIG)
    try:
        rel = con.sql(load_sql("bid_log_read_shards"), params={"files": str(path), "hive": False,
                                                              "n_shards": int(n_shards)})
        schema = rel.limit(0).to_arrow_table().schema
    finally:
        con.close()
    return pa.schema(list(schema)[:-1])


def _same_values(source: pa.DataType, written: pa.DataType) -> bool:
    """Whether a column of type ``source`` reaches DuckDB's files unchanged but for the text's offset width."""
    text = (pa.string(), pa.large_string())
    return source == written or (source in text and written in text)


def _auction_shards(dataset, n_rows: int, n_shards: int) -> np.ndarray | None:
    """The shard (int16) of every row's auction, md5 computed once per distinct id; ``None``: not applicable.

    Ids written auction by auction are numbered by their runs (one batch of the column in memory);
    integer ids that recur after another id are factorized over the whole column instead.
    """
    from .identity_keys import auction_runs
    from .memory_shards import _distinct_shards, factorized_in_order

    def column():
        return (b.column(0) for b in dataset.to_batches(columns=["auction_id"], batch_size=SPLIT_BATCH_ROWS,
                                                         batch_readahead=0, fragment_readahead=0, use_threads=False))

    runs = auction_runs(column(), n_rows)
    if runs is not None:
        codes, ids = runs.codes, runs.ids
    elif pa.types.is_integer(kind := dataset.schema.field("auction_id").type) and kind != pa.uint64():  # int64 holds it
        chunks = list(column())
        if sum(c.null_count for c in chunks) or sum(len(c) for c in chunks) != n_rows:
            return None
        values = np.concatenate([c.to_numpy() for c in chunks]) if chunks else np.empty(0, dtype=np.int64)
        del chunks
        codes, uniques = factorized_in_order(values.astype(np.int64, copy=False))
        del values
        ids = np.asarray(uniques, dtype=np.int64)
    else:
        return None
    return _distinct_shards(ids, n_shards).astype(np.int16)[codes]


def _duckdb_error():
    import duckdb

    return duckdb.Error


def split_by_auction(path: str | Path, folder: str | Path, n_shards: int) -> bool:
    """Write ``path``'s rows into ``folder/shard=K/part-0.parquet`` as DuckDB's route does; ``False`` when not applicable.

    Parameters
    ----------
    path : str or Path
        The bid log; only a single Parquet file is split here.
    folder : str or Path
        Created; must not hold shards yet. Left partly written when this returns ``False``.
    n_shards : int
        At least 2.

    Returns
    -------
    bool
        ``True`` when the shard files are written (the same rows, in the same order, with the same
        types as ``sql/bid_log_read_shards.sql`` and :func:`~counterbid.readers.shards.write_shards`).

    Notes
    -----
    Memory: the auction column's codes (4 bytes per bid while the shards are computed), the shard of
    every row (2 bytes per bid) and one batch of the log with its copy.
    """
    import pyarrow.dataset as pads

    path = Path(path)
    if not path.is_file():
        return False
    try:
        fmt = pads.ParquetFileFormat(  # one row group's column in flight, not the whole row group's bytes
            default_fragment_scan_options=pads.ParquetFragmentScanOptions(pre_buffer=False))
        dataset = pads.dataset(str(path), format=fmt)
        schema = dataset.schema
        out_schema = _duckdb_schema(path, n_shards)
        if "auction_id" not in schema.names or schema.names != out_schema.names or not all(
                _same_values(a.type, b.type) for a, b in zip(schema, out_schema)):
            return False
        auction_type = schema.field("auction_id").type
        if not (pa.types.is_integer(auction_type) or pa.types.is_string(auction_type)
                or pa.types.is_large_string(auction_type)):
            return False
        n_rows = dataset.count_rows()
        shard = _auction_shards(dataset, n_rows, n_shards)
        if shard is None:
            return False
        _write_in_shard_order(path, shard, out_schema, Path(folder), int(n_shards))
    except (pa.ArrowException, OSError, ValueError, _duckdb_error()):
        return False
    return True


def _label_columns(schema: pa.Schema) -> list[str]:
    """Text columns other than the identity columns: a handful of values, read as the file's dictionaries."""
    from .bid_log import IDENTITY_COLUMNS

    return [f.name for f in schema if f.name not in IDENTITY_COLUMNS and (pa.types.is_string(f.type)
                                                                         or pa.types.is_large_string(f.type))]


def _write_in_shard_order(path: Path, shard: np.ndarray, schema: pa.Schema, folder: Path, n_shards: int) -> None:
    """Stream ``path`` batch by batch into the shard files, each batch put in shard order by one take.

    Label columns travel as the file's dictionaries and are written as dictionary pages without
    the Arrow schema, so they read back as plain text, as DuckDB's files hold them.
    """
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    # The C library's allocator for the batches and their copies: under Arrow's default pool (mimalloc)
    # this loop spent 5.6-7.1 s of system CPU at 10M bids, against 1.7-3.5 s (three runs each).
    pool = pa.system_memory_pool()
    labels = _label_columns(schema)
    source = pq.ParquetFile(path, pre_buffer=False, read_dictionary=labels, memory_map=False)
    stream = pa.schema([pa.field(f.name, pa.dictionary(pa.int32(), f.type) if f.name in labels else f.type)
                        for f in schema])
    writers: dict[int, pq.ParquetWriter] = {}
    done = 0
    try:
        for batch in source.iter_batches(batch_size=SPLIT_BATCH_ROWS, use_threads=False):
            n = batch.num_rows
            if n == 0:
                continue
            if done + n > shard.size:
                raise ValueError("the log grew while it was split")
            batch = batch if batch.schema.equals(stream) else batch.cast(stream)
            part = shard[done:done + n]
            order = np.argsort(part, kind="stable")
            bounds = np.concatenate([[0], np.cumsum(np.bincount(part, minlength=n_shards))])
            ordered = pc.take(batch, pa.array(order), memory_pool=pool)
            del order, batch
            for k in np.flatnonzero(np.diff(bounds)):
                k = int(k)
                if k not in writers:
                    (folder / f"shard={k}").mkdir(parents=True, exist_ok=True)
                    writers[k] = pq.ParquetWriter(folder / f"shard={k}" / "part-0.parquet", stream,
                                                  store_schema=False)
                writers[k].write_batch(ordered.slice(bounds[k], bounds[k + 1] - bounds[k]))
            done += n
        if done != shard.size:
            raise ValueError("the log changed while it was split")
        if not writers:  # no rows: one empty shard with the columns
            (folder / "shard=0").mkdir(parents=True, exist_ok=True)
            writers[0] = pq.ParquetWriter(folder / "shard=0" / "part-0.parquet", stream, store_schema=False)
    finally:
        for w in writers.values():
            w.close()
