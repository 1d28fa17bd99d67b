"""Text auction and bidder ids of a bid log as integers, without a dictionary of their text.

:func:`~counterbid.readers.bid_log.read_bids` codes a text id column with Arrow's
``dictionary_encode``: one hash table holding every distinct string, then a pandas index of them.
Identity needs less than that, and :func:`keyed_bids` reads the two identity columns another way:

* **Auction ids** of a log written auction by auction come in runs. Arrow compares every id with
  the one before it (no hashing), so the codes are run numbers and only the text of each run's
  first row is kept. The runs are distinct auctions exactly when no id starts two runs: DuckDB's
  64-bit ``hash`` of the run starts (one per auction, not per bid; ``sql/bid_log_id_keys.sql``),
  sorted, has no equal neighbours -- distinct keys prove distinct ids, so no collision can merge two
  auctions. Otherwise (ids that recur after another id, or a key collision) the reader gives way.
  The codes are those ``pd.factorize`` gives (order of first appearance).
* **Bidder ids** reach Python only as DuckDB's 64-bit ``hash`` of their text
  (``sql/bid_log_bidder_keys.sql``, read straight from the Parquet files), and integer codes come from
  those keys (``pd.factorize`` of int64: the same codes, in order of first appearance, as the
  dictionary's, unless two ids share a key). A collision merges two bidders into one cluster of the
  bidder-clustered variance; with ``n`` distinct ids its probability is at most
  ``n (n - 1) / 2**65`` (2.7e-4 at 10**8 ids, 2.7e-8 at 10**6; docs/method.md, "Bidder ids"). The
  estimates themselves do not use bidder ids. Two colliding bidders in one auction look like a
  duplicate bid: validation refuses the keyed frame. A day read whole then goes to the plain reader,
  which either names a real duplicate or estimates without the collision; a day read shard file by
  shard file keys bidders alike in every shard, so there the shard's text is checked and, if it
  holds no duplicate, the command stops with one line naming the collision
  (:func:`~counterbid.readers.shards.one_shard_pieces`). DuckDB's key is compared only within one
  run of a command, never stored.

Every fault gives way to the plain reader (:func:`keyed_bids` returns ``None``), whose messages
quote the text; the plain reader is also the reference of this one in the tests (the same codes).
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as pads

from counterbid.estimators.errors import InputError

from .bid_log import BATCH_ROWS, arrow_kind, read_bids

__all__ = ["AuctionRuns", "KeyedBids", "auction_runs", "bidder_keys", "id_keys", "keyed_bids"]

#: DuckDB threads reading the bidder keys. At 10M text bids one thread spent less CPU (about 0.5 s)
#: than two; the read runs beside Arrow's read of the other columns anyway.
BIDDER_KEY_THREADS = 1


@dataclass(frozen=True)
class AuctionRuns:
    """Auction codes of a log written auction by auction: ``codes`` per row (never decreasing, from 0)
    and ``ids``, the text of each code's auction (distinct)."""

    codes: np.ndarray
    ids: pa.Array


@dataclass(frozen=True)
class KeyedBids:
    """A bid log's frame with integer ``auction_id`` (:class:`AuctionRuns` codes) and ``bidder_id``
    (codes from 64-bit keys), and the text of each auction code (``auction_ids``)."""

    bids: pd.DataFrame
    auction_ids: pa.Array


def _duckdb():
    import duckdb

    return duckdb


def id_keys(ids: pa.Array) -> np.ndarray:
    """DuckDB's 64-bit ``hash`` of each text id (``sql/bid_log_id_keys.sql``), as int64.

    Parameters
    ----------
    ids : pyarrow string array, without nulls

    Returns
    -------
    ndarray of int64
        The same key ``sql/bid_log_bidder_keys.sql`` gives the same text.
    """
    return _keys_of("bid_log_id_keys", "id_key", candidate_ids=pa.table({"id": ids}))


def _keys_of(statement: str, column: str, params: dict | None = None, **relations) -> np.ndarray:
    """One DuckDB statement's 64-bit key column as int64 (the same bits), ``relations`` registered by name."""
    from counterbid.sql import load_sql

    con = _duckdb().connect(config={"threads": BIDDER_KEY_THREADS})
    try:
        for name, table in relations.items():
            con.register(name, table)
        keys = con.execute(load_sql(statement), params or {}).fetchnumpy()[column]
    finally:
        con.close()
    if isinstance(keys, np.ma.MaskedArray):  # nulls: the caller's plain reader names them
        if keys.mask is not np.ma.nomask and bool(np.any(keys.mask)):
            raise ValueError(f"{statement}: a null key")
        keys = keys.data
    return np.asarray(keys, dtype=np.uint64).view(np.int64)


def auction_runs(chunks, n_rows: int) -> AuctionRuns | None:
    """Run codes of a text auction column read batch by batch; ``None`` unless its ids come in runs.

    Parameters
    ----------
    chunks : iterable of pyarrow string arrays
        The column's batches, in row order.
    n_rows : int
        Rows of the column.

    Returns
    -------
    AuctionRuns or None
        ``None`` when an id is null, when an id starts two runs (ids not written auction by
        auction) or two run starts share a 64-bit key, or when the batches hold other than
        ``n_rows`` rows.

    Notes
    -----
    Memory: one batch of text and the text of the run starts (one string per auction).
    """
    codes = np.empty(n_rows, dtype=np.int32 if n_rows < 2**31 else np.int64)
    starts: list[pa.Array] = []
    last, done, runs = None, 0, 0
    for chunk in chunks:
        n = len(chunk)
        if n == 0:
            continue
        if chunk.null_count or done + n > n_rows:
            return None
        new = np.empty(n, dtype=bool)
        new[0] = last is None or not pc.equal(last, chunk[0]).as_py()
        if n > 1:
            new[1:] = pc.not_equal(chunk.slice(1), chunk.slice(0, n - 1)).to_numpy(zero_copy_only=False)
        part = codes[done:done + n]
        np.cumsum(new, out=part)
        part += runs - 1
        runs += int(new.sum())
        starts.append(chunk.filter(pa.array(new)))
        last, done = chunk[n - 1], done + n
    if done != n_rows or not starts:
        return None
    ids = pa.concat_arrays(starts)
    del starts
    keys = np.sort(id_keys(ids))
    if bool((keys[1:] == keys[:-1]).any()):  # an id recurs after another (or two keys collide)
        return None
    return AuctionRuns(codes, ids)


def bidder_keys(files: list[str]) -> np.ndarray | None:
    """DuckDB's 64-bit key of every bid's ``bidder_id`` (``sql/bid_log_bidder_keys.sql``), in row order.

    Parameters
    ----------
    files : list of str
        The log's Parquet files, in the order their rows are read.

    Returns
    -------
    ndarray of int64, or None
        ``None`` when an id is null or DuckDB cannot read the files (the plain reader names the fault).
    """
    try:
        return _keys_of("bid_log_bidder_keys", "bidder_key", {"files": list(files)})
    except (_duckdb().Error, ValueError):
        return None


def _codes_of_keys(keys: np.ndarray) -> np.ndarray:
    """Codes 0..B-1 of 64-bit keys in order of first appearance (``pd.factorize``), int32 when they fit."""
    codes, uniques = pd.factorize(keys, sort=False)
    return codes.astype(np.int32) if len(uniques) < 2**31 else codes


def _bidder_labels(files: list[str], as_keys: bool) -> np.ndarray | None:
    keys = bidder_keys(files)
    if keys is None or as_keys:
        return keys
    return _codes_of_keys(keys)


def _keyed_columns(dataset: pads.Dataset) -> bool:
    """Both identity columns are plain text columns of the files themselves (not folder names)."""
    first = next(iter(dataset.get_fragments()), None)
    stored = set(first.physical_schema.names) if first is not None else set()  # a file's own columns
    for name in ("auction_id", "bidder_id"):
        if name not in dataset.schema.names or name not in stored:
            return False
        t = dataset.schema.field(name).type
        if arrow_kind(t) != "text" or pa.types.is_dictionary(t):
            return False
    return True


def _runs_of(dataset: pads.Dataset, n_rows: int) -> AuctionRuns | None:
    batches = dataset.to_batches(columns=["auction_id"], batch_size=BATCH_ROWS, batch_readahead=0,
                                 fragment_readahead=0, use_threads=False)
    return auction_runs((b.column(0) for b in batches), n_rows)


def keyed_bids(path: str | Path, columns: list[str], *, source: str | None = None, threads: int = 1,
               bidder_keys_only: bool = False) -> KeyedBids | None:
    """A bid log's frame with its text identity columns as integers (see the module notes), or ``None``.

    Parameters
    ----------
    path : str or Path
        A Parquet file or a (Hive-partitioned) folder of them.
    columns : list of str
        Columns to read, ``auction_id`` and ``bidder_id`` among them.
    source : str, optional
        Name of the input in messages (default ``path``).
    threads : int
        Columns the other columns are read with at once (:func:`~.bid_log.read_bids`); the bidder
        keys are read by DuckDB on a thread of their own meanwhile.
    bidder_keys_only : bool
        ``bidder_id`` as the 64-bit keys themselves rather than codes (ids that must meet across
        inputs read apart within one run).

    Returns
    -------
    KeyedBids or None
        ``None`` whenever this reader does not apply or the input has a fault: the identity columns
        are not both plain text columns of the files, an id is null, the auction ids do not come
        in runs, or anything is unreadable. The caller then reads the log with
        :func:`~.bid_log.read_bids`, whose messages name the fault.
    """
    path = Path(path)
    try:
        dataset = pads.dataset(str(path), format="parquet", partitioning="hive" if path.is_dir() else None)
        if not _keyed_columns(dataset) or not {"auction_id", "bidder_id"} <= set(columns):
            return None
        n_rows = dataset.count_rows()
        runs = _runs_of(dataset, n_rows)  # first: a log not written in runs costs only this read
        if runs is None:
            return None
        with ThreadPoolExecutor(1) as pool:  # DuckDB and Arrow both work without the GIL
            bidders = pool.submit(_bidder_labels, list(dataset.files), bidder_keys_only)
            others = read_bids(path, columns=[c for c in columns if c not in ("auction_id", "bidder_id")],
                               source=source, threads=threads)
            bidder = bidders.result()
    except (InputError, pa.ArrowException, OSError, ValueError):
        return None
    if bidder is None or len(bidder) != n_rows or len(others) != n_rows:
        return None
    frame = others.assign(auction_id=runs.codes, bidder_id=bidder)
    return KeyedBids(frame, runs.ids)
