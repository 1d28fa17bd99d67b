"""The two engines behind one small interface: where a bid log's or a staged day's stratum pieces come from.

:class:`LocalEngine` reads shard by shard in this process (:mod:`counterbid.readers.shards`);
:class:`SparkEngine` lets Spark read the bids and estimate the shards in parallel
(:mod:`counterbid.readers.spark_shards`, imported only when used: PySpark is the ``spark`` extra).
Both return the same :class:`~counterbid.readers.shards.ShardPieces` for the same input, so the
command line (:func:`estimate_bid_log`) and the pipeline's estimate step
(``counterbid.operators.partition.estimate_partition``) call :meth:`Engine.log_pieces` /
:meth:`Engine.day_pieces` and combine the pieces one way.
"""

from __future__ import annotations

import datetime as dt
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Protocol

from counterbid.estimators import ArmEstimates, Experiment, combine_pieces, n_shards
from counterbid.estimators.errors import InputError

from .bidder_spill import MAX_SPILL_ROWS, BidderSpill
from .memory_shards import fits_in_memory, pieces_in_memory
from .shards import ShardPieces, bid_log_rows, column_names, pieces_by_shard, staged_bid_log_shards
from .shards import max_bids_per_shard as max_bids_setting

__all__ = ["Engine", "LocalEngine", "SparkEngine", "StagedDay", "estimate_bid_log"]


@dataclass(frozen=True)
class StagedDay:
    """One (experiment, day) as the load step staged it.

    Attributes
    ----------
    ds : datetime.date
    shards : list of (int, Path)
        Shard number and its staged Parquet folder.
    n_shards : int
        Shards the load step split the day into.
    staged_bids : int or None
        Bids the load step staged (an engine that reads the lake again must find as many); ``None``
        when the engine reads the staged shards themselves.
    source : str
        Name of the staged day in messages.
    """

    ds: dt.date
    shards: list[tuple[int, Path]]
    n_shards: int
    staged_bids: int | None
    source: str


class Engine(Protocol):
    """Where stratum pieces come from: a bid log (the command line) or a staged day (the estimate step)."""

    name: str

    def log_pieces(self, path: str, experiment: Experiment, *, max_bids_per_shard: int | None,
                   cluster: str) -> ShardPieces:
        """The pieces of every shard of a bid log (``ceil(rows / max_bids_per_shard)`` shards)."""
        ...

    def day_pieces(self, day: StagedDay, experiment: Experiment, *, cluster: str) -> ShardPieces:
        """The pieces of a staged day, in its staged shards, recorded under its day."""
        ...


@dataclass(frozen=True)
class LocalEngine:
    """Shard by shard in this process.

    A log of several shards that fits the memory budget is read once and split in memory
    (:func:`~counterbid.readers.memory_shards.pieces_in_memory`); a larger one is split by DuckDB into
    shard files, each read, estimated and freed in turn, its bidder sums set aside on disk
    (:class:`~counterbid.readers.bidder_spill.BidderSpill`, at most ``max_spill_rows`` rows added
    up at once). Bad input always gets the file-based
    split's message: the in-memory attempt gives way to it on any input error. ``keyed_ids``: text
    auction and bidder ids of a log read in memory or in one piece become integers without a
    dictionary of their text (:mod:`~counterbid.readers.identity_keys`); False keeps the dictionary
    codes (the reference of the keyed reader in the tests).
    """

    name: str = "local"
    max_spill_rows: int = MAX_SPILL_ROWS
    keyed_ids: bool = True

    def log_pieces(self, path: str, experiment: Experiment, *, max_bids_per_shard: int | None = None,
                   cluster: str = "auto") -> ShardPieces:
        rows = bid_log_rows(path)
        shards = n_shards(rows, max_bids_setting(max_bids_per_shard))
        if shards > 1 and "auction_id" not in column_names(path):
            shards = 1  # nothing to shard by: the validation of the whole log names the missing column
        if shards > 1 and fits_in_memory(rows):
            try:
                return pieces_in_memory(path, experiment, shards, cluster=cluster, source=str(path),
                                        keyed_ids=self.keyed_ids)
            except InputError:
                pass  # the file-based split below names the fault, its shard and row, as it always has
        with staged_bid_log_shards(path, shards) as shard_list, tempfile.TemporaryDirectory(
                prefix="counterbid-bidder-sums-") as spill_folder:
            # several shards: each shard's bidder sums go to disk as it is done and are added
            # bucket by bucket at the end, so memory is set by a shard, not by the day's bidders
            spill = BidderSpill(Path(spill_folder), max_rows=self.max_spill_rows) if shards > 1 else None
            found = pieces_by_shard(shard_list, experiment, cluster=cluster, source=str(path),
                                    hash_bidders=shards > 1 and cluster != "auction",
                                    code_bidders=shards == 1 or cluster == "auction", spill=spill,
                                    keyed_ids=self.keyed_ids)
            grams = spill.grams() if spill is not None and cluster != "auction" else None
        if grams is None:
            return ShardPieces(found.pieces, found.n_excluded_auctions, shards)
        return ShardPieces(found.pieces, found.n_excluded_auctions, shards, gram=grams[0],
                           segment_grams=grams[1] or None)

    def day_pieces(self, day: StagedDay, experiment: Experiment, *, cluster: str = "auto") -> ShardPieces:
        return pieces_by_shard(day.shards, experiment, cluster=cluster, day=day.ds, source=day.source)


@dataclass(frozen=True)
class SparkEngine:
    """Spark reads the bids (a log, or the day's partition of the lake under ``lake_root``) and estimates the shards.

    Attributes
    ----------
    spark : pyspark.sql.SparkSession
    lake_root : str, optional
        Root of the bid lake (``ds=YYYY-MM-DD`` folders); needed for :meth:`day_pieces`.
    """

    spark: object
    lake_root: str | None = None
    name: str = "spark"

    def log_pieces(self, path: str, experiment: Experiment, *, max_bids_per_shard: int | None = None,
                   cluster: str = "auto") -> ShardPieces:
        from .spark_shards import bid_log_pieces_on_spark

        return bid_log_pieces_on_spark(self.spark, str(path), experiment, max_bids_per_shard=max_bids_per_shard,
                                       cluster=cluster)

    def day_pieces(self, day: StagedDay, experiment: Experiment, *, cluster: str = "auto",
                   bidder_rows_sink=None) -> ShardPieces:
        """The day's pieces from the lake, in the load step's shards.

        Messages name the staged day, as the local engine's do (a shard's row numbers count from
        the start of that shard, which is the staged shard file). Spark reads the lake again, so
        it must find the bids the load step staged and the validate step checked: a different
        count means the partition changed in between. With ``bidder_rows_sink`` the executors
        store the pieces' bidder sums through it and only the day's bidder forms reach the driver
        (:func:`~counterbid.readers.spark_shards.lake_partition_pieces_on_spark`).
        """
        from .spark_shards import lake_partition_pieces_on_spark

        if self.lake_root in (None, ""):
            raise InputError("the Spark engine reads the day from the bid lake: `lake_root` is required")
        found = lake_partition_pieces_on_spark(self.spark, str(self.lake_root), experiment=experiment, ds=day.ds,
                                               shards=day.n_shards, cluster=cluster, source=day.source,
                                               bidder_rows_sink=bidder_rows_sink)
        # every single-bidder auction left out is one bid; every other bid is in a piece
        seen = sum(p.n_bids for p in found.pieces) + found.n_excluded_auctions
        if seen != int(day.staged_bids):
            raise InputError(f"{self.lake_root} ds={day.ds}: Spark read {seen} bids of experiment {experiment.id!r}, "
                             f"the load step staged {day.staged_bids}; the partition changed after it was checked: "
                             "run the day again from the 'load' step")
        return found


def estimate_bid_log(path: str | Path, experiment: Experiment, *, engine: Engine | None = None,
                     max_bids_per_shard: int | None = None, confidence_level: float = 0.95,
                     cluster: str = "auto") -> ArmEstimates:
    """Per-arm estimates of a bid log on an engine (what ``counterbid estimate`` runs).

    Parameters
    ----------
    path : str or Path
        A Parquet file or folder of one experiment's bids (the Spark engine also reads object-store URLs).
    experiment : Experiment
    engine : Engine, optional
        Default :class:`LocalEngine`.
    max_bids_per_shard : int, optional
        Default: ``$COUNTERBID_MAX_BIDS_PER_SHARD``, else
        :data:`~counterbid.estimators.MAX_BIDS_PER_SHARD`.
    confidence_level : float
    cluster : {'auto', 'auction', 'bidder'}

    Returns
    -------
    ArmEstimates
        :func:`~counterbid.estimators.combine_pieces` of every shard's pieces, with the shards
        and the engine recorded.
    """
    engine = engine or LocalEngine()
    found = engine.log_pieces(str(path), experiment, max_bids_per_shard=max_bids_per_shard, cluster=cluster)
    result = combine_pieces(found.pieces, experiment, confidence_level=confidence_level, cluster=cluster,
                            n_excluded_auctions=found.n_excluded_auctions, source=str(path), bidder_gram=found.gram,
                            segment_grams=found.segment_grams)
    return result.on(shards=found.shards, engine=engine.name)
