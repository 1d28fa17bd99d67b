"""A bid log that fits the memory budget, split into its shards in memory (no Parquet rewrite).

:func:`~counterbid.readers.shards.staged_bid_log_shards` splits a large log by writing every shard to
a temporary folder (DuckDB computes the md5 shard of every row, pyarrow rewrites the day) and reads
each shard back. When the whole day fits the memory budget (:func:`fits_in_memory`) the same shards
come from one read instead: the log is read once (:func:`~counterbid.readers.bid_log.read_bids`:
text ids as dictionary codes), the md5 shard rule is computed once per *distinct* auction id
(``sql/bid_log_shard_of_distinct_ids.sql``, the rule of :func:`counterbid.estimators.shard_of`) and mapped to
the rows through the codes, and each shard's rows are taken in their order in the log, which is
their order in the shard file. Bidder ids travel as the day's dictionary codes (one integer label
per distinct id of the log, the same label in every shard), so shards meet on integers when they
are combined and no Python string is made per id.

Every shard is validated and estimated by the same per-shard body as a shard file
(:func:`~counterbid.readers.shards.one_shard_pieces`, given the shard's rows instead of its path),
under the same name (``<log> (shard K)``). Bad input takes the plain path:
on any :class:`~counterbid.estimators.errors.InputError` the caller runs the file-based split, so the
message (its shard and row numbers) is the one that path gives.
"""

from __future__ import annotations

import os
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from counterbid.estimators import BID_COLUMNS, Experiment, StratumPiece
from counterbid.estimators.errors import InputError, no_pieces_error

from .bid_log import read_bids

__all__ = ["BYTES_PER_BID", "MEMORY_BUDGET_ENV", "MEMORY_BUDGET_MIB", "fits_in_memory", "memory_budget_mib",
           "pieces_in_memory", "row_shards"]

#: Environment variable setting the memory budget of a day split in memory, in MiB.
MEMORY_BUDGET_ENV = "COUNTERBID_MEMORY_BUDGET_MIB"
#: Default budget: a day whose in-memory split needs more goes through the file-based split, whose
#: peak is set by one shard.
MEMORY_BUDGET_MIB = 1200
#: Peak memory of the in-memory split per bid of the log, imports excluded, rounded up (measured
#: with text auction and bidder ids at 10M bids, two read threads: 1357 MiB peak RSS of the command,
#: of which about 230 MiB imports: the frame, two text columns' Arrow strings while Arrow codes
#: them, one shard's copy, its validated arrays and the estimator's temporaries; docs/scale.md).
BYTES_PER_BID = 120
#: Columns read at once by the in-memory split (Arrow decodes and codes text without the GIL; at 10M
#: text bids two threads cost about 0.1 GiB more than one, within :data:`BYTES_PER_BID`).
READ_THREADS = 2


def memory_budget_mib(value: object = None) -> int:
    """The budget in MiB: ``value``, else ``$COUNTERBID_MEMORY_BUDGET_MIB``, else :data:`MEMORY_BUDGET_MIB`."""
    what = "memory_budget_mib"
    if value in (None, ""):
        value, what = os.environ.get(MEMORY_BUDGET_ENV, ""), MEMORY_BUDGET_ENV
    if value in (None, ""):
        return MEMORY_BUDGET_MIB
    text = str(value).strip()
    if isinstance(value, bool) or not text.isdigit():
        raise InputError(f"{what} must be a whole number of MiB >= 0; got {value!r}")
    return int(text)


def fits_in_memory(n_bids: int, budget_mib: int | None = None) -> bool:
    """Whether a log of ``n_bids`` bids is split in memory: ``n_bids * BYTES_PER_BID`` within the budget."""
    budget = memory_budget_mib(budget_mib)
    return int(n_bids) * BYTES_PER_BID <= budget * 2**20


def _distinct_shards(ids, n_shards: int) -> np.ndarray:
    """The md5 shard of each value of ``ids`` (distinct ids, text or integers), by DuckDB; int64."""
    import duckdb
    import pyarrow as pa

    from counterbid.sql import load_sql

    distinct_ids = pa.table({"id": ids if isinstance(ids, pa.Array) else pa.array(ids)})  # noqa: F841 -- scanned by name below
    con = duckdb.connect()
    try:
        con.register("distinct_ids", distinct_ids)
        found = con.execute(load_sql("bid_log_shard_of_distinct_ids"),
                            {"n_shards": int(n_shards)}).fetchnumpy()["shard"]
    finally:
        con.close()
    return np.asarray(found, dtype=np.int64)


def factorized_in_order(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``pd.factorize(values, sort=False)`` of integers; without hashing when they never decrease.

    A log written auction by auction holds each auction id in one run of rows: when the ids never
    decrease, the distinct ids are the runs' first values (already distinct, as they increase) and
    a row's code is the number of runs before its own, the numbers factorize gives.
    """
    if values.size > 1 and bool(np.all(values[1:] >= values[:-1])):
        change = values[1:] != values[:-1]
        codes = np.empty(values.size, dtype=np.int64)
        codes[0] = 0
        np.cumsum(change, out=codes[1:])
        return codes, values[np.concatenate([[0], np.flatnonzero(change) + 1])]
    return pd.factorize(values, sort=False)


def row_shards(auction_ids: pd.Series, n_shards: int) -> np.ndarray:
    """The shard of every row's auction, hashing each distinct id once (null: shard 0).

    The same numbers as ``shard_of`` (``int(md5(str(id)).hexdigest()[:8], 16) % n_shards``) and as
    ``sql/bid_log_read_shards.sql``; a categorical is hashed through its categories, integers through
    their distinct values (runs of a log written auction by auction need no hashing to find them).

    Returns
    -------
    ndarray of int16
    """
    if isinstance(auction_ids.dtype, pd.CategoricalDtype):
        codes = auction_ids.cat.codes.to_numpy()
        per_id = _distinct_shards(auction_ids.cat.categories, n_shards).astype(np.int16)
        out = np.zeros(codes.size, dtype=np.int16)
        known = codes >= 0
        out[known] = per_id[codes[known]] if not known.all() else per_id[codes]
        return out
    nulls = auction_ids.isna().to_numpy() if auction_ids.hasnans else None
    values = auction_ids.to_numpy(dtype=np.int64, na_value=0) if nulls is not None else auction_ids.to_numpy()
    codes, uniques = factorized_in_order(values)
    out = _distinct_shards(np.asarray(uniques, dtype=np.int64), n_shards).astype(np.int16)[codes]
    if nulls is not None:
        out[nulls] = 0
    return out


def _integer_bidders(bids: pd.DataFrame) -> pd.DataFrame:
    """The frame with text bidder ids replaced by the day's dictionary codes (when none is null).

    A code is the bidder's label in every shard, so the shards' bidder sums meet on integers; the
    text is needed only for a message, and messages come from the plain path.
    """
    col = bids["bidder_id"]
    if isinstance(col.dtype, pd.CategoricalDtype):
        codes = col.cat.codes.to_numpy()
        if codes.size and codes.min() >= 0:
            return bids.assign(bidder_id=codes)
    return bids


def _shard_pieces(bids: pd.DataFrame, shard: np.ndarray, present: list[int],
                  experiment: Experiment, cluster: str, name: str, *, auction_covariance: bool):
    """Every present shard's pieces, single-bidder auctions left out, and whether some shard held nothing else."""
    from .shards import one_shard_pieces

    pieces: list[StratumPiece] = []
    excluded, single_bidders = 0, False
    for k in present:
        where = name if len(present) == 1 else f"{name} (shard {k})"
        # the shard's rows in log order, as the file-based split writes them; the same per-shard body
        found = one_shard_pieces(k, bids.take(np.flatnonzero(shard == k)).reset_index(drop=True), experiment,
                                 cluster=cluster, where=where, alone=len(present) == 1,
                                 auction_covariance=auction_covariance)
        pieces += found.pieces
        excluded += found.n_excluded_auctions
        single_bidders = single_bidders or found.single_bidders_only
    return pieces, excluded, single_bidders


def _keyed_or_plain(path, columns: list[str], n_shards: int, name: str, keyed_ids: bool):
    """The day's frame with integer auction and bidder ids, and every row's shard.

    With ``keyed_ids`` text ids are read by :func:`~counterbid.readers.identity_keys.keyed_bids`
    (auction runs, bidder keys; the md5 shard of each run's id); otherwise, or when that reader gives
    way, by :func:`~counterbid.readers.bid_log.read_bids` (dictionary codes): the same codes, the
    same shards.
    """
    keyed = None
    if keyed_ids:
        from .identity_keys import keyed_bids

        keyed = keyed_bids(path, columns, source=name, threads=READ_THREADS)
    if keyed is None:
        bids = _integer_bidders(read_bids(path, columns=columns, source=name, threads=READ_THREADS))
        return bids, row_shards(bids["auction_id"], n_shards)
    per_auction = _distinct_shards(keyed.auction_ids, n_shards).astype(np.int16)
    return keyed.bids, per_auction[keyed.bids["auction_id"].to_numpy()]


def pieces_in_memory(path: str | Path, experiment: Experiment, n_shards: int, *, cluster: str = "auto",
                     source: str | None = None, keyed_ids: bool = True):
    """The pieces of every shard of a log split in memory (see the module notes).

    Parameters
    ----------
    path : str or Path
        A Parquet file or folder holding an ``auction_id`` column.
    experiment : Experiment
    n_shards : int
        At least 2 (one shard needs no split).
    cluster : {'auto', 'auction', 'bidder'}
    source : str, optional
        Name of the input in messages (default ``path``).
    keyed_ids : bool
        Text ids through :func:`~counterbid.readers.identity_keys.keyed_bids` (default); False
        reads them as dictionary codes (the plain reader, the reference in the tests).

    Returns
    -------
    ShardPieces
        As :func:`~counterbid.readers.shards.pieces_by_shard` over the file-based split, with
        bidder ids as the day's integer labels.

    Raises
    ------
    InputError
        Whatever the input's first fault; the caller then runs the file-based split for its message.
    """
    from .shards import ShardPieces

    name = str(source or path)
    columns = ["experiment_id", *BID_COLUMNS, *experiment.auction_columns]
    bids, shard = _keyed_or_plain(path, columns, n_shards, name, keyed_ids)
    # each shard's rows are found when it is estimated (a pass over 2 bytes per bid), in log order:
    # no sorted copy of every row number is held meanwhile
    present = np.flatnonzero(np.bincount(shard, minlength=int(n_shards))).tolist()
    with warnings.catch_warnings(record=True) as said:
        warnings.simplefilter("always")
        # Pieces that keep bidder sums are combined by bidder: their auction-clustered covariance
        # (a gather and a bincount per metric) is left out. Only `auto` can still end up clustering
        # by auction -- when some shard's bidders repeat and another's do not -- and then every
        # shard is estimated again with it.
        found = _shard_pieces(bids, shard, present, experiment, cluster, name, auction_covariance=False)
        if cluster == "auto" and len({p.bidder_sums is None for p in found[0]}) > 1:
            del said[:]
            found = _shard_pieces(bids, shard, present, experiment, cluster, name, auction_covariance=True)
    pieces, excluded, single_bidders = found
    if not pieces:
        raise no_pieces_error(name, experiment.id, single_bidders=single_bidders, n_excluded_auctions=excluded)
    for w in said:  # only once the whole log went through: a failed attempt says nothing
        warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    return ShardPieces(pieces, excluded, int(n_shards))
