"""One staged shard of a day as a task of its own: estimate it, store its pieces, and read every shard's back.

With the local engine the daily DAG maps one task over each staged shard of a day staged in
several (:class:`counterbid.operators.pipeline.EstimateShardOperator`), so a Celery or Kubernetes
executor spreads a large day over workers; a day of one shard is estimated by its estimate step. Each shard task reads only its shard, estimates its
strata (:func:`counterbid.readers.shards.one_shard_pieces`) and stores the pieces as Parquet
frames (:func:`counterbid.estimators.pieces_to_frames`) in ``day/pieces/shard=K/`` of the staging
folder, with a small record (``shard.json``); the per-bidder sums, when kept, go to one wide file
(``bidder_sums_wide.parquet``: the stratum, the bidder id as text and one column per revenue label),
so reading a shard's bidders back costs one text value per bidder, not one per bidder and label.
The estimate step then combines them
(:func:`shard_task_pieces`) exactly as it combines the pieces of shards estimated one after another
in one task. Nothing of size O(bids) goes through XCom.

The pieces live inside the staged day, so a new load of the day (which replaces ``day/``) removes
them with the shards they came from; a retried shard task replaces its own folder in one rename.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
from collections.abc import Callable, Iterable
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from counterbid.estimators import PIECE_FRAMES, Experiment, StratumPiece, pieces_from_frames, pieces_to_frames
from counterbid.estimators._ids import ids_as_text
from counterbid.estimators.errors import InputError, no_pieces_error
from counterbid.readers.bidder_spill import MAX_SPILL_ROWS, BidderSpill
from counterbid.readers.id_hashes import fnv1a_64
from counterbid.readers.shards import ShardPieces, one_shard_pieces

from .staging import StagedPartition, replace_folder, write_json

__all__ = ["RECORD", "estimate_shard", "shard_pieces_folder", "shard_task_pieces", "validated_shards"]

#: The record a shard task writes last, beside its pieces: what the estimate step checks.
RECORD = "shard.json"
#: The shard's per-bidder sums: ``n_bidders``, ``bidder_id`` (text), ``sum_0 .. sum_K`` (the piece's sum labels).
WIDE_SUMS = "bidder_sums_wide.parquet"


def _wide_sums(pieces: list[StratumPiece]) -> pa.Table | None:
    """Every piece's bidder sums in one wide table (``None`` when no piece keeps them)."""
    parts = []
    for p in pieces:
        if p.bidder_ids is None:
            continue
        columns = {"n_bidders": pa.array(np.full(p.bidder_ids.size, p.n_bidders, dtype=np.int64)),
                   "segment": pa.array([p.key.segment] * p.bidder_ids.size, type=pa.string()),
                   "bidder_id": pa.array(ids_as_text(p.bidder_ids), type=pa.string())}
        columns |= {f"sum_{c}": pa.array(p.bidder_sums[:, c]) for c in range(p.bidder_sums.shape[1])}
        parts.append(pa.table(columns))
    return pa.concat_tables(parts, promote_options="default") if parts else None


def _stratum_rows(wide: pa.Table, piece: StratumPiece):
    """The mask of ``piece``'s rows in the wide table: its number of bidders and its segment (null: unsegmented)."""
    same_n = pc.equal(wide.column("n_bidders"), piece.n_bidders)
    segment = wide.column("segment")
    same_segment = pc.is_null(segment) if piece.key.segment is None else pc.equal(segment, piece.key.segment)
    return pc.and_(same_n, pc.fill_null(same_segment, False))


def _with_sums(pieces: list[StratumPiece], wide: pa.Table, where: Path, *, arrow_ids: bool = False) -> list[StratumPiece]:
    """The pieces with the bidder sums of :func:`_wide_sums` put back (bidder ids as text).

    ``arrow_ids``: the ids stay an Arrow string column (for a rows sink; no Python string per bidder).
    """
    out = []
    for p in pieces:
        rows = wide.filter(_stratum_rows(wide, p))
        names = [f"sum_{c}" for c in range(len(p.sum_labels))]
        if rows.num_rows == 0 or any(n not in rows.column_names or rows.column(n).null_count for n in names):
            segment = "" if p.key.segment is None else f" of segment {p.key.segment!r}"
            raise InputError(f"{where}: no bidder sums for the {p.n_bidders}-bidder stratum{segment}; "
                             "run its 'estimate_shard' task again")
        ids = rows.column("bidder_id") if arrow_ids else rows.column("bidder_id").to_numpy(zero_copy_only=False)
        sums = np.column_stack([rows.column(n).to_numpy() for n in names])
        out.append(dataclasses.replace(p, bidder_ids=ids, bidder_sums=sums))
    return out


def shard_pieces_folder(staged: StagedPartition, k: int) -> Path:
    """Folder of shard ``k``'s stored pieces: ``<staging>/<experiment>/ds=.../day/pieces/shard=K``."""
    return staged.day / "pieces" / f"shard={int(k)}"


def _where(staged: StagedPartition, k: int, n: int) -> str:
    """A shard's name in messages, as the single-task estimate words it."""
    return str(staged.day) if n == 1 else f"{staged.day} (shard {k})"


def estimate_shard(experiment: Experiment, *, ds: dt.date, staging_root: str | Path, shard: int,
                   cluster: str = "auto") -> dict:
    """Estimate one staged shard and store its stratum pieces; a rerun replaces them.

    Parameters
    ----------
    experiment : Experiment
        With measured position weights already filled (``partition.staged_experiment``).
    ds : datetime.date
    staging_root : str or Path
    shard : int
        One of the shards the load step staged.
    cluster : {'auto', 'auction', 'bidder'}
        As the estimate step will combine them.

    Returns
    -------
    dict
        ``{"experiment_id", "ds", "shard", "shards", "pieces", "bids", "excluded_auctions",
        "folder"}`` (small: returned to XCom).

    Raises
    ------
    InputError
        The shard was not staged, or its bids fail validation (the message names the shard).
    """
    staged = StagedPartition.at(staging_root, experiment.id, ds)
    shards = staged.shards()
    if int(shard) not in shards:
        raise InputError(f"{staged.shard(shard)}: shard {shard} of experiment {experiment.id!r} on {ds} was not "
                         f"staged (staged: {', '.join(map(str, shards)) or 'none'}); run the 'load' step again")
    found = one_shard_pieces(int(shard), staged.shard(shard), experiment, cluster=cluster, day=ds,
                             where=_where(staged, int(shard), len(shards)), alone=len(shards) == 1)
    record = {"shard": int(shard), "shards": len(shards), "cluster": cluster, "pieces": len(found.pieces),
              "bids": sum(p.n_bids for p in found.pieces), "excluded_auctions": found.n_excluded_auctions,
              "single_bidders_only": found.single_bidders_only}

    record["bidder_sums"] = [p.n_bidders for p in found.pieces if p.bidder_ids is not None]

    def fill(folder: Path) -> None:
        folder.mkdir(parents=True)
        if found.pieces:  # the small frames without the bidder sums, which go to one wide file
            for name, frame in pieces_to_frames([p.without_bidder_sums() for p in found.pieces]).items():
                pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), folder / f"{name}.parquet")
            wide = _wide_sums(found.pieces)
            if wide is not None:
                pq.write_table(wide, folder / WIDE_SUMS)
        write_json(record, folder / RECORD)

    target = shard_pieces_folder(staged, shard)
    replace_folder(fill, target)
    return {"experiment_id": experiment.id, "ds": ds.isoformat(), **record, "folder": str(target)}


def _hashed(pieces: list[StratumPiece], wide: pa.Table) -> list[StratumPiece]:
    """The pieces with their text bidder ids replaced by 64-bit hashes of the text (no Python string made)."""
    out = []
    for p in pieces:
        ids = wide.filter(_stratum_rows(wide, p)).column("bidder_id")
        out.append(dataclasses.replace(p, bidder_ids=fnv1a_64(ids), bidder_codes=None, bidder_space=None))
    return out


def _shard_record(staged: StagedPartition, experiment: Experiment, k: int, n_shards: int, cluster: str) -> dict:
    """Shard ``k``'s record, refused (one line) when missing or estimated with another clustering."""
    folder = shard_pieces_folder(staged, k)
    if not (folder / RECORD).exists():
        raise InputError(f"{folder}: the pieces of shard {k} of {n_shards} of experiment {experiment.id!r} "
                         "are missing; run its 'estimate_shard' task first")
    record = json.loads((folder / RECORD).read_text(encoding="utf-8"))
    if record.get("cluster") != cluster or int(record.get("shards", -1)) != n_shards:
        raise InputError(f"{folder}: the pieces of shard {k} were estimated with cluster "
                         f"{record.get('cluster')!r} over {record.get('shards')} shard(s), not {cluster!r} over "
                         f"{n_shards}; run its 'estimate_shard' task again")
    return record


def _all_with_sums(record: dict) -> bool:
    """Whether every piece of a shard's record kept bidder sums."""
    return len(record.get("bidder_sums", [])) == int(record["pieces"])


def shard_task_pieces(staged: StagedPartition, experiment: Experiment, *, cluster: str,
                      spill_folder: Path | None = None, max_spill_rows: int = MAX_SPILL_ROWS,
                      bidder_rows_sink: Callable[[int, list[StratumPiece]], object] | None = None) -> ShardPieces:
    """Every staged shard's pieces, as the shard tasks stored them (what the estimate step combines).

    Parameters
    ----------
    staged : StagedPartition
    experiment : Experiment
    cluster : {'auto', 'auction', 'bidder'}
        The clustering the shard tasks must have used.

    spill_folder : Path, optional
        An empty folder (used when the day has several shards): each shard's bidder sums, keyed
        by the 64-bit hash of the id text, are also set aside there
        (:class:`~counterbid.readers.bidder_spill.BidderSpill`) and added into the day's bidder
        forms bucket by bucket, at most ``max_spill_rows`` rows at a time: the day's rows then
        need no matching of text ids across shards.
    max_spill_rows : int
    bidder_rows_sink : callable, optional
        With ``spill_folder``, a day of several shards and every piece with bidder sums: each
        shard's pieces, with their sums (bidder ids as text), go to ``bidder_rows_sink(shard,
        pieces)`` one shard at a time (e.g. a
        :class:`~counterbid.operators.staged_bidder_sums.ShardRowsSink`), and the pieces returned
        carry none: the step then holds one shard's bidders at a time, never the day's.

    Returns
    -------
    ShardPieces
        By shard, then number of bidders; bidder ids as text (none when the sink took them); with
        ``spill_folder``, the day's bidder forms (``gram``, ``segment_grams``) when every piece
        carries bidder sums.

    Raises
    ------
    InputError
        One line naming the first shard whose pieces are missing (its task has not run, or
        failed), or were estimated with another clustering; or, as the single-task estimate
        says it, that no shard holds a piece.
    """
    staged.require(staged.day, step="load")
    shards = staged.shards()
    records = {k: _shard_record(staged, experiment, k, len(shards), cluster) for k in shards}
    pieces, excluded, single_bidders = [], 0, False
    # one shard is the day: its sums are bounded by the shard already and combine as the single task's
    spill = None if spill_folder is None or len(shards) < 2 else BidderSpill(Path(spill_folder), max_rows=max_spill_rows)
    # every piece with sums: they go to the sink shard by shard and the day combines from the spill's forms
    apart = bidder_rows_sink is not None and spill is not None and cluster != "auction" \
        and all(_all_with_sums(r) for r in records.values())
    for k in shards:
        folder, record = shard_pieces_folder(staged, k), records[k]
        excluded += int(record["excluded_auctions"])
        single_bidders = single_bidders or bool(record["single_bidders_only"])
        if int(record["pieces"]):
            mine = pieces_from_frames({name: pq.read_table(folder / f"{name}.parquet").to_pandas()
                                       for name in PIECE_FRAMES})
            with_sums = set(record.get("bidder_sums", []))
            if with_sums:
                wide = pq.read_table(folder / WIDE_SUMS)
                kept = _with_sums([p for p in mine if p.n_bidders in with_sums], wide, folder, arrow_ids=apart)
                mine = kept + [p for p in mine if p.n_bidders not in with_sums]
                if spill is not None:
                    spill.add(_hashed(kept, wide) + [p for p in mine if p.n_bidders not in with_sums])
                del wide, kept
            elif spill is not None:
                spill.add(mine)
            mine = sorted(mine, key=lambda p: p.n_bidders)
            if apart:  # this shard's rows to the sink; the pieces keep only their small parts
                bidder_rows_sink(int(k), mine)
                mine = [p.without_bidder_sums() for p in mine]
            pieces += mine
    if not pieces:
        raise no_pieces_error(str(staged.day), experiment.id, single_bidders=single_bidders,
                              n_excluded_auctions=excluded)
    grams = spill.grams() if spill is not None and cluster != "auction" else None
    if grams is None:
        return ShardPieces(pieces, excluded, len(shards))
    return ShardPieces(pieces, excluded, len(shards), gram=grams[0], segment_grams=grams[1] or None)


def validated_shards(staging_root: str | Path, ds: dt.date, experiment_ids: Iterable[str]) -> list[dict]:
    """One ``{"experiment_id", "shard"}`` per staged shard of each experiment given that staged several.

    What the DAG maps the shard tasks over. A day staged as one shard fits one task's memory
    budget: its estimate step estimates it (``estimate_partition(shard_tasks=True)`` does so for a
    one-shard day), so it gets no shard task, and its bidder sums are not stored and read back.

    Parameters
    ----------
    staging_root : str or Path
    ds : datetime.date
    experiment_ids : iterable of str
        The experiments whose validate step succeeded in this run.

    Returns
    -------
    list of dict
        By experiment, then shard: small, fit for XCom. Empty when every experiment staged one shard.
    """
    staged = {e: StagedPartition.at(staging_root, e, ds).shards() for e in experiment_ids}
    return [{"experiment_id": e, "shard": k} for e, shards in staged.items() if len(shards) > 1 for k in shards]
