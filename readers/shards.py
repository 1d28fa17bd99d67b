"""The local engine: a day estimated shard by shard in this process (:class:`~counterbid.readers.engines.LocalEngine`).

A day with more bids than ``max_bids_per_shard`` is split into ``ceil(bids / max)`` shards by the
stable hash of its auction ids (:func:`counterbid.estimators.shard_of`; DuckDB computes the
same number for every row, ``sql/lake_read_partition_shards.sql`` and ``sql/bid_log_read_shards.sql``,
and :func:`write_shards` streams the rows into one folder per shard). Each shard is read alone (:func:`~counterbid.readers.bid_log.read_bids`),
validated, estimated per stratum (:func:`~counterbid.estimators.stratum_pieces`) and freed
before the next is read, so peak memory is set by the shard, not by the day; only the pieces (a few
numbers per stratum, plus per-bidder sums when clustering by bidder) are kept.
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.dataset as pads

from counterbid.estimators import BID_COLUMNS, MAX_BIDS_PER_SHARD, BidderGram, Experiment, StratumPiece, prepare_bids, stratum_pieces
from counterbid.estimators.errors import InputError, NothingToEstimate, no_pieces_error

from .bid_log import read_bids

__all__ = [
    "MAX_BIDS_ENV",
    "SHARD_SCAN_CONFIG",
    "distinct_experiment_ids",
    "OneShard",
    "ShardPieces",
    "bid_log_rows",
    "column_names",
    "max_bids_per_shard",
    "one_shard_pieces",
    "pieces_by_shard",
    "shard_folders",
    "staged_bid_log_shards",
    "write_shards",
]

#: DuckDB settings of the scan that computes each row's shard: one thread keeps one row group in
#: flight (measured at 10M bids: 0.6 GiB peak RSS with imports, 5.8 s; 0.8 GiB and 8.2 s with two
#: threads on the shared 2-core machine).
SHARD_SCAN_CONFIG = {"threads": 1}
#: Environment variable overriding :data:`~counterbid.estimators.MAX_BIDS_PER_SHARD`
#: (the DAG's default; the ``--max-bids-per-shard`` option of ``counterbid estimate``).
MAX_BIDS_ENV = "COUNTERBID_MAX_BIDS_PER_SHARD"


def max_bids_per_shard(value: object = None, *, what: str = "max_bids_per_shard") -> int:
    """The largest shard in bids: ``value``, else ``$COUNTERBID_MAX_BIDS_PER_SHARD``, else the default.

    Parameters
    ----------
    value : int or str, optional
        A number or its text (a rendered Airflow template); empty or ``None`` falls through.
    what : str
        The setting's name in the error message.

    Returns
    -------
    int
        At least 1.
    """
    if value in (None, ""):
        value, what = os.environ.get(MAX_BIDS_ENV, ""), MAX_BIDS_ENV
    if value in (None, ""):
        return MAX_BIDS_PER_SHARD
    try:
        number = int(value) if not isinstance(value, bool) and str(value).strip().lstrip("+").isdigit() else None
    except (TypeError, ValueError):
        number = None
    if number is None or number < 1:
        raise InputError(f"{what} must be a whole number of bids >= 1; got {value!r}")
    return number


_max_bids_setting = max_bids_per_shard  # the keyword argument below shadows the name


def shard_folders(folder: str | Path) -> list[tuple[int, Path]]:
    """``(shard, folder)`` of every ``shard=K`` sub-folder of ``folder``, by shard."""
    found = []
    for p in Path(folder).iterdir():
        name, _, k = p.name.partition("=")
        if p.is_dir() and name == "shard" and k.isdigit():
            found.append((int(k), p))
    return sorted(found)


@contextmanager
def _bid_log_dataset(path: str | Path) -> Iterator[pads.Dataset]:
    """A bid log as an Arrow dataset (a file, or a Hive-partitioned folder); pyarrow's errors inside
    the block become one line naming the log."""
    path = Path(path)
    try:
        yield pads.dataset(str(path), format="parquet", partitioning="hive" if path.is_dir() else None)
    except InputError:
        raise
    except (OSError, ValueError) as exc:  # pyarrow's errors derive from these
        raise InputError(f"{path}: not a readable Parquet file ({str(exc).splitlines()[0]})") from None


def distinct_experiment_ids(path: str | Path) -> list[str] | None:
    """The distinct ``experiment_id`` values of a bid log, batch by batch (``None`` without the column).

    Memory: one batch of the one column, not the column (which as text is larger than the bids).
    """
    import pyarrow.compute as pc

    with _bid_log_dataset(path) as dataset:
        if "experiment_id" not in dataset.schema.names:
            return None
        seen: dict[str, None] = {}
        for batch in dataset.to_batches(columns=["experiment_id"], batch_size=2**20):
            for value in pc.unique(batch.column(0)).to_pylist():
                if value is not None:
                    seen.setdefault(str(value), None)
        return list(seen)


def bid_log_rows(path: str | Path) -> int:
    """Rows of a bid log (a Parquet file or a Hive-partitioned folder), from the footers only."""
    if not Path(path).exists():
        raise InputError(f"{path}: no such file or folder")
    with _bid_log_dataset(path) as dataset:
        return int(dataset.count_rows())


def column_names(path: str | Path) -> list[str]:
    """Column names of a bid log (the footers only)."""
    with _bid_log_dataset(path) as dataset:
        return dataset.schema.names


def write_shards(batches, folder: str | Path, n_shards: int) -> list[int]:
    """Stream record batches whose last column is ``shard`` into ``folder/shard=K/part-0.parquet``.

    Parameters
    ----------
    batches : pyarrow.RecordBatchReader
        Rows with a trailing ``shard`` column (``0 .. n_shards - 1``), e.g. from
        ``sql/lake_read_partition_shards.sql``.
    folder : path
        Created; must not hold shards yet.
    n_shards : int

    Returns
    -------
    list of int
        Rows written per shard.

    Notes
    -----
    Memory: one batch (the writers flush each batch as its own row group). Rows keep their order
    within a shard. A stream of no rows writes one empty ``shard=0`` file with the columns, so the
    checks can name what is missing.
    """
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    folder = Path(folder)
    schema = batches.schema
    names = schema.names[:-1]
    if schema.names[-1] != "shard":
        raise InputError("write_shards: the last column of the stream must be 'shard'")
    data_schema = pa.schema([schema.field(n) for n in names])
    writers: dict[int, pq.ParquetWriter] = {}
    rows = [0] * int(n_shards)

    def writer(k: int) -> pq.ParquetWriter:
        if k not in writers:
            (folder / f"shard={k}").mkdir(parents=True, exist_ok=True)
            writers[k] = pq.ParquetWriter(folder / f"shard={k}" / "part-0.parquet", data_schema)
        return writers[k]

    try:
        for batch in batches:
            if batch.num_rows == 0:
                continue
            shard = batch.column(len(names))
            data = pa.RecordBatch.from_arrays(batch.columns[: len(names)], schema=data_schema)
            if n_shards == 1:
                writer(0).write_batch(data)
                rows[0] += data.num_rows
                continue
            for k in range(int(n_shards)):
                part = data.filter(pc.equal(shard, k))
                if part.num_rows:
                    writer(k).write_batch(part)
                    rows[k] += part.num_rows
        if not writers:
            writer(0)  # an empty day: one empty shard with the columns
    finally:
        for w in writers.values():
            w.close()
    return rows


@contextmanager
def staged_bid_log_shards(path: str | Path, shards: int, *, by_auction: bool = True) -> Iterator[list[tuple[int, Path]]]:
    """A bid log split into ``shards`` shards in a temporary folder (removed on exit).

    DuckDB computes each row's shard (``sql/bid_log_read_shards.sql``) and streams the rows; they
    are written shard by shard (:func:`write_shards`), one batch in memory. A single file with
    integer auction ids, or text ones written auction by auction, is split with the shard computed
    once per auction instead (:func:`~counterbid.readers.file_shards.split_by_auction`: the same
    files; ``by_auction=False`` keeps DuckDB's route, the reference in the tests). One shard needs
    no copy: the log itself is yielded as shard 0.
    """
    if shards <= 1:
        yield [(0, Path(path))]
        return
    import duckdb

    from counterbid.sql import load_sql

    path = Path(path)
    files = str(path / "**" / "*.parquet") if path.is_dir() else str(path)
    with tempfile.TemporaryDirectory(prefix="counterbid-shards-") as tmp:
        from .file_shards import split_by_auction

        if by_auction and split_by_auction(path, Path(tmp) / "by-auction", shards):  # the md5 rule once per auction
            yield shard_folders(Path(tmp) / "by-auction")
            return
        con = duckdb.connect(config=SHARD_SCAN_CONFIG)
        try:
            reader = con.sql(load_sql("bid_log_read_shards"), params={"files": files, "hive": path.is_dir(),
                                                                      "n_shards": int(shards)}).to_arrow_reader(2**20)
            write_shards(reader, Path(tmp) / "day", shards)
        except duckdb.Error as exc:
            raise InputError(f"{path}: cannot split the bid log into shards ({str(exc).splitlines()[0]})") from None
        finally:
            con.close()
        yield shard_folders(Path(tmp) / "day")


def _bidder_codes(bids):
    """The categorical codes of ``bids``' text bidder ids and the column, or ``None`` (no such column, a null)."""
    col = bids["bidder_id"] if "bidder_id" in bids.columns else None
    if col is None or not isinstance(col.dtype, pd.CategoricalDtype):
        return None
    codes = col.cat.codes.to_numpy()
    if not codes.size or codes.min() < 0:  # nulls: the validation names them
        return None
    return codes, col


def _hashed_bidders(bids, keyed: bool = False):
    """``bids`` with text bidder ids replaced by their 64-bit hashes (distinct ids hashed once); else as is.

    The hash is FNV-1a (:mod:`.id_hashes`), or with ``keyed`` DuckDB's key of the text
    (:func:`~counterbid.readers.identity_keys.id_keys`): the key the keyed reader gives the same
    id in the other shards of the run.
    """
    if keyed:
        from .identity_keys import id_keys as hash_of
    else:
        from .id_hashes import fnv1a_64 as hash_of

    coded = _bidder_codes(bids)
    if coded is None:
        return None
    codes, col = coded
    return bids.assign(bidder_id=hash_of(pa.array(col.cat.categories, type=pa.large_string()))[codes])


def _coded_bidders(bids):
    """``bids`` with text bidder ids replaced by their categorical codes (no null); else ``None``.

    Within one input the codes label the distinct ids one to one, so an input estimated alone (one
    shard: the whole log) needs neither the text nor a hash; no Python string is made per id.
    """
    coded = _bidder_codes(bids)
    return None if coded is None else bids.assign(bidder_id=coded[0])


@dataclass(frozen=True)
class ShardPieces:
    """The stratum pieces of every shard of an input, the single-bidder auctions left out, and the shards read.

    ``gram``: the input's bidder sums as a :class:`~counterbid.estimators.BidderGram` when an
    engine added them per bidder itself (the Spark engine, or the local engine's
    :class:`~counterbid.readers.bidder_spill.BidderSpill`); the pieces then carry none.
    ``segment_grams``: the same per segment label of a segmented input.
    """

    pieces: list[StratumPiece]
    n_excluded_auctions: int
    shards: int = 1
    gram: BidderGram | None = None
    segment_grams: dict[str, BidderGram] | None = None


def pieces_by_shard(
    shards: Iterable[tuple[int, Path]],
    experiment: Experiment,
    *,
    cluster: str = "auto",
    day=None,
    source: str | None = None,
    hash_bidders: bool = False,
    code_bidders: bool = False,
    spill=None,
    keyed_ids: bool = False,
) -> ShardPieces:
    """Read, validate and estimate each shard alone; keep only its stratum pieces.

    Parameters
    ----------
    shards : iterable of (int, Path)
        Shard number and its Parquet file or folder.
    experiment : Experiment
        With measured position weights already filled.
    cluster : {'auto', 'auction', 'bidder'}
        Passed to :func:`~counterbid.estimators.stratum_pieces` for each shard. With
        ``'auto'`` a shard keeps per-bidder sums when its bidder ids repeat across its auctions
        (a shard holds at least half of ``max_bids_per_shard`` bids of whole auctions, so a
        bidder who repeats in the day repeats in the shard); the combination then clusters by
        bidder when every piece carries the sums.
    day : date-like, optional
        Recorded in every piece.
    source : str, optional
        Name of the input in messages (default: each shard's path).
    hash_bidders : bool, optional
        Text bidder ids as the 64-bit FNV-1a hash of their text (:mod:`.id_hashes`, each distinct id
        of a shard hashed once), so that shards combine on integers. Only for pieces that are
        combined and dropped (the command line's); stored pieces keep the text. Messages still
        quote the text.
    code_bidders : bool, optional
        Text bidder ids as their dictionary codes (:func:`_coded_bidders`): for one shard holding the
        whole input, whose pieces are combined and dropped (the command line's), or for shards
        clustered by auction (``cluster='auction'``: no bidder is met across shards, so codes local
        to a shard serve and no hash can collide). Messages quote the text.
    spill : BidderSpill, optional
        Set each shard's bidder sums aside there as the shard is done
        (:class:`~counterbid.readers.bidder_spill.BidderSpill`): the pieces returned carry none,
        and ``spill.grams()`` gives the day's bidder forms, so memory is not set by the day's bidders.
    keyed_ids : bool, optional
        With ``code_bidders`` or ``hash_bidders``: text ids read by
        :func:`~counterbid.readers.identity_keys.keyed_bids` (see :func:`one_shard_pieces`).

    Notes
    -----
    Peak memory is one shard's frame or its validated arrays (the frame is dropped before the
    estimate), plus the pieces; ``EstimatorWarning``s of every shard propagate.
    """
    pieces: list[StratumPiece] = []
    excluded = 0
    single_bidders = False
    shards = list(shards)
    for k, path in shards:
        where = str(source or path) if len(shards) == 1 else f"{source or path} (shard {k})"
        found = one_shard_pieces(k, path, experiment, cluster=cluster, day=day, where=where, alone=len(shards) == 1,
                                 hash_bidders=hash_bidders,
                                 code_bidders=code_bidders and (len(shards) == 1 or cluster == "auction"),
                                 keyed_ids=keyed_ids)
        pieces += found.pieces if spill is None else spill.add(found.pieces)
        excluded += found.n_excluded_auctions
        single_bidders = single_bidders or found.single_bidders_only
        del found  # with a spill, this shard's bidder sums are on disk only
    if not pieces:
        raise no_pieces_error(source or "bids", experiment.id, single_bidders=single_bidders,
                              n_excluded_auctions=excluded)
    return ShardPieces(pieces, excluded, len(shards))


@dataclass(frozen=True)
class OneShard:
    """One shard's stratum pieces, its single-bidder auctions left out, and whether it held nothing else."""

    pieces: list[StratumPiece]
    n_excluded_auctions: int
    single_bidders_only: bool = False


def one_shard_pieces(
    k: int,
    bids: str | Path | pd.DataFrame,
    experiment: Experiment,
    *,
    cluster: str = "auto",
    day=None,
    where: str | None = None,
    alone: bool = True,
    hash_bidders: bool = False,
    code_bidders: bool = False,
    auction_covariance: bool = True,
    keyed_ids: bool = False,
) -> OneShard:
    """Read, validate and estimate one shard; keep only its stratum pieces.

    The one per-shard body of the local engine: the file-based split passes each shard's file,
    the in-memory split (:func:`~counterbid.readers.memory_shards.pieces_in_memory`) each shard's
    rows of the day's frame.

    Parameters
    ----------
    k : int
        The shard's number (recorded in every piece).
    bids : str, Path or pandas.DataFrame
        Its Parquet file or folder, or its rows already read (as :func:`~.bid_log.read_bids`
        returns them; the frame is dropped once validated, so pass the only reference).
    experiment : Experiment
        With measured position weights already filled.
    cluster : {'auto', 'auction', 'bidder'}
    day : date-like, optional
        Recorded in every piece.
    where : str, optional
        Name of the shard in messages (default: its path, or ``bids`` for a frame).
    alone : bool
        The shard is the whole input: a shard of single-bidder auctions only is then an error
        (``NothingToEstimate``); otherwise they are left out and counted, the other shards hold
        the bids.
    hash_bidders : bool
        Text bidder ids as 64-bit hashes of their text (distinct ids hashed once; see
        :mod:`counterbid.readers.id_hashes`); a bad input's message still quotes the id's text.
    code_bidders : bool
        Text bidder ids as their dictionary codes, for a shard that is the whole input (see
        :func:`pieces_by_shard`); a bad input's message still quotes the id's text.
    auction_covariance : bool
        False: a piece that keeps bidder sums leaves its auction-clustered covariance NaN
        (:func:`~counterbid.estimators.stratum_pieces`); only for pieces combined by bidder and dropped.
    keyed_ids : bool
        With ``code_bidders`` or ``hash_bidders`` and a path: text auction and bidder ids read as
        integers without a dictionary of their text (:func:`~counterbid.readers.identity_keys.keyed_bids`:
        the same codes, or DuckDB's 64-bit key of each bidder id); any fault is then read again by the
        plain reader, whose message quotes the text (its hashed bidders then take DuckDB's key too,
        so every shard of a run agrees).

    Returns
    -------
    OneShard
    """
    in_memory = isinstance(bids, pd.DataFrame)
    where = str(where or ("bids" if in_memory else bids))
    columns = ["experiment_id", *BID_COLUMNS, *experiment.auction_columns]
    if not in_memory and keyed_ids and (code_bidders or hash_bidders):
        from .identity_keys import keyed_bids

        keyed = keyed_bids(bids, columns, source=where, bidder_keys_only=not code_bidders)
        if keyed is not None:
            try:
                prepared = prepare_bids(keyed.bids, experiment, source=where)
            except InputError:  # NothingToEstimate too: the plain reader says it as it always has
                prepared = None
            del keyed
            if prepared is not None:
                return _one_shard_of(prepared, k, experiment, cluster, day, where, auction_covariance)
    if not in_memory:
        bids = read_bids(bids, columns=columns, source=where)
    hashed = _hashed_bidders(bids, keyed_ids) if hash_bidders else _coded_bidders(bids) if code_bidders else None
    try:
        prepared = prepare_bids(bids if hashed is None else hashed, experiment, source=where)
    except NothingToEstimate as exc:
        if alone:
            raise
        return OneShard([], int(exc.n_excluded_auctions), True)
    except InputError:
        if hashed is not None:
            prepare_bids(bids, experiment, source=where)  # the message quotes the id's text
            if hash_bidders:  # the text is sound: two distinct ids of one auction share a 64-bit key
                raise InputError(f"{where}: two distinct bidder ids of one auction share a 64-bit key (a hash "
                                 "collision, odds about 2**-64 per pair of bidders); estimate this log with "
                                 "cluster 'auction', which does not key bidders across shards") from None
        raise
    finally:
        del bids, hashed  # only the validated arrays from here on: one shard bounds the memory
    return _one_shard_of(prepared, k, experiment, cluster, day, where, auction_covariance)


def _one_shard_of(prepared, k: int, experiment: Experiment, cluster: str, day, where: str,
                  auction_covariance: bool) -> OneShard:
    """One shard's pieces from its validated bids."""
    excluded = int(prepared.n_excluded_auctions)
    return OneShard(stratum_pieces(prepared, experiment, shard=k, day=day, cluster=cluster, source=where,
                                   auction_covariance=auction_covariance), excluded)
