"""The experiment-to-date inputs of one day: stored pieces, and the running bidder window.

Bidder clustering of the experiment to date needs every window day's bidder sums added bidder by
bidder. Instead of reading them all back every day, the results database keeps the window's
running totals ``U_b`` per bidder with their Gram form and distinct-bidder count
(``bidder_window*`` tables; :mod:`counterbid.estimators.window_totals`). A day whose window is the
stored one plus today (the daily run) reads only today's bidders' totals (a join on an integer key of today's ids in
SQL) and writes them back with today added: its cost follows today's bidders, not the
experiment's age. It runs one bucket of bidders at a time (:mod:`.window_buckets`: today's rows
set aside by key range (the top bits of the integer key), then looked up, added and staged bucket by bucket), so its
memory is a bucket's, not the day's; the first day of a window (nothing stored before it) builds
its totals the same way, from an empty window. Anything else is rebuilt from the stored pieces,
exactly as the full recombination, and also bucket by bucket (:mod:`.window_rebuild`: the stored
bidder sums streamed from the sink and set aside with today's by bucket, so its memory is a
bucket's, not the window's): a rerun of a day the window already holds, an earlier day, a window
that lost or regained a day (burn-in, exclusion, a failed warm-up or drift check), a change of bid
unit. A day's write drops a stored window that covers it unless it brings the window's update,
and an update whose base changed since its estimate step is dropped too, so the stored window
always equals what its days' stored pieces give.

A segmented experiment's window holds, beside the pooled totals (``segment`` null), the same
totals of each segment's pieces, so its per-segment to-date rows take the same route
(``combine_pieces(..., segment_grams=...)``; docs/method.md "Segments").
"""

from __future__ import annotations

import datetime as dt
import json
import shutil
import tempfile
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as pads
import pyarrow.parquet as pq

from counterbid.estimators import (
    BidderGram, Experiment, StratumPiece, extend_gram, pieces_from_frames, pieces_to_frames,
)
from counterbid.estimators._ids import ids_as_text
from counterbid.estimators.constants import REVENUE, piece_labels
from counterbid.estimators.days import parse_day
from counterbid.estimators.errors import InputError
from counterbid.estimators.window_totals import WindowTotals

from . import window_buckets, window_rebuild
from .bidder_sum_rows import repeated
from .hooks import ResultsHook
from .results_schema import WINDOW_TABLES, WindowWrite, staged_rows
from .staged_bidder_sums import distinct_bidders, shard_file
from .staging import write_json, write_parquet
from .window_buckets import bucket_bits, bucket_today, bucket_totals, staged_piece_rows
from .window_rebuild import bucket_window, window_bucket_totals

__all__ = ["ToDateInputs", "load_window_write", "stage_window_write", "to_date_inputs"]

#: Results table of each frame of :func:`counterbid.estimators.pieces_to_frames`.
PIECE_TABLES = {
    "strata": "stratum_pieces",
    "arms": "stratum_piece_arms",
    "covariance": "stratum_piece_covariance",
    "bidder_sums": "stratum_piece_bidder_sums",
}
_MANIFEST = "bidder_window.json"


@dataclass(frozen=True)
class ToDateInputs:
    """What the experiment-to-date rows combine: pieces (without bidder sums when ``gram`` is set).

    Attributes
    ----------
    pieces : list of StratumPiece
    gram : BidderGram or None
        The window's bidder totals, every segment together (``combine_pieces(..., bidder_gram=gram)``).
    write : WindowWrite or None
        The running window to store with the day.
    route : str
        ``'extended'`` (today's bidders only), ``'stored'`` (today left out: the stored window as it
        is), ``'rebuilt'`` (from every stored piece), or
        ``'by_auction'`` (no bidder sums needed or available).
    segment_grams : dict of str to BidderGram
        The same per segment label of a segmented experiment
        (``combine_pieces(..., segment_grams=segment_grams)``); empty otherwise.
    """

    pieces: list[StratumPiece]
    gram: BidderGram | None
    write: WindowWrite | None
    route: str
    segment_grams: dict[str, BidderGram] = field(default_factory=dict)


def pieces_of_rows(frames: Mapping[str, pd.DataFrame | None], *, without_sums: bool = False) -> list[StratumPiece]:
    """Pieces from rows of the results tables; ``without_sums``: the strata rows' bidder sums ignored."""
    if all(frames.get(table) is None for table in PIECE_TABLES.values()):
        return []
    empty = pieces_to_frames([])
    back = {}
    for name, table in PIECE_TABLES.items():
        frame = frames.get(table)
        if frame is None or (without_sums and name == "bidder_sums"):
            back[name] = empty[name]
            continue
        frame = frame.drop(columns=["experiment_id", "run_id", "computed_at"], errors="ignore").rename(columns={"ds": "day"})
        frame["day"] = [parse_day(d).isoformat() for d in frame["day"]]
        if without_sums and name == "strata":
            frame["n_distinct_bidders"] = -1
        back[name] = frame
    return pieces_from_frames(back)


def to_date_inputs(hook: ResultsHook, *, experiment: Experiment, used_before: list[dt.date], today: list[StratumPiece],
                   today_in_window: bool, ds: dt.date, cluster: str, run_id: str, computed_at,
                   today_sums: Path | None = None, work_folder: Path | None = None) -> ToDateInputs:
    """The pieces (and bidder window) the experiment-to-date rows of ``ds`` combine.

    Parameters
    ----------
    hook : ResultsHook
    experiment : Experiment
    used_before : list of datetime.date
        Days of the analysis window before ``ds`` (their pieces are stored).
    today : list of StratumPiece
        Today's pieces (with bidder sums when the day is clustered by bidder).
    today_in_window : bool
        Whether ``ds`` is in the analysis window.
    ds : datetime.date
    cluster : {'auto', 'auction', 'bidder'}
    run_id : str
    computed_at : timestamp
    today_sums : Path, optional
        Today's pieces carry no bidder sums: their ``stratum_piece_bidder_sums`` rows are staged
        in this folder, one file per shard
        (:class:`~counterbid.operators.staged_bidder_sums.ShardRowsSink`), and are read from
        there one shard at a time.
    work_folder : Path, optional
        Where the daily update sets today's rows aside by bucket and stages the new totals
        (a folder of the caller's, e.g. inside the staging folder, so that
        :func:`stage_window_write` moves the file); without it a temporary folder is used and the
        totals are read back into memory.

    Returns
    -------
    ToDateInputs
    """
    small = hook.stored_piece_frames(experiment_id=experiment.id, days=used_before,
                                     tables=[t for t in PIECE_TABLES.values() if t != "stratum_piece_bidder_sums"])
    stored = pieces_of_rows(small, without_sums=True)
    mine = today if today_in_window else []
    strata = small.get("stratum_pieces")
    with_sums = cluster != "auction" and (strata is None or bool((strata["n_distinct_bidders"] >= 0).all())) \
        and (today_sums is not None or all(p.bidder_sums is not None for p in mine))
    window = stored + [p.without_bidder_sums() for p in mine]
    if not window or not with_sums:
        return ToDateInputs(window, None, None, "by_auction")
    exponent = max(p.bid_exponent for p in window)
    days_text = ",".join(d.isoformat() for d in sorted([*used_before, *([ds] if today_in_window else [])]))
    base = hook.bidder_window(experiment_id=experiment.id)
    base_days = None if base is None else str(base[0]["days_used"].iloc[0])
    before_text = ",".join(d.isoformat() for d in sorted(used_before))
    order = None if base is None else _sum_order(base[0])
    if base is not None and used_before and base_days == before_text and order is not None \
            and sorted(order) == sorted(_labels(experiment)) \
            and int(base[0]["bid_exponent"].iloc[0]) == exponent and _keys_of(base[0]) == _stored_keys(strata):
        grams = _grams_of_rows(base[0], base[1], exponent, experiment)
        if not mine:  # today left out: the stored window is the window
            return _inputs(window, grams, None, "stored")
        extended = _extended_in(hook, experiment, mine, today_sums, grams, order, exponent, work_folder)
        if extended is not None:
            write = _window_write(experiment, "extend", base_days, days_text, ds, grams, None, run_id, computed_at,
                                  order=order, totals_rows=extended)
            return _inputs(window, grams, write, "extended")
    if not used_before:  # today alone: its totals, bucket by bucket as a daily update from an empty window
        grams: dict = {}
        rows = _extended_in(hook, experiment, mine, today_sums, grams, _labels(experiment), exponent, work_folder,
                            lookup=False)
        write = _window_write(experiment, "replace", None, days_text, ds, grams, None, run_id, computed_at,
                              totals_rows=rows)
        return _inputs(window, grams, write, "rebuilt")
    # the rebuild streams the stored bidder sums bucket by bucket; the other tables read above serve it
    grams, rows = _rebuilt_in(hook, experiment, stored, used_before, _distinct_rows(strata), mine, today_sums,
                              exponent, work_folder)
    write = _window_write(experiment, "replace", None, days_text, ds, grams, None, run_id, computed_at,
                          totals_rows=rows)
    return _inputs(window, grams, write, "rebuilt")


def _distinct_rows(strata: pd.DataFrame | None) -> int:
    """The stored pieces' (piece, bidder) rows, from their recorded distinct bidders."""
    return 0 if strata is None else int(strata["n_distinct_bidders"].clip(lower=0).sum())


def _rebuilt_in(hook: ResultsHook, experiment: Experiment, stored: list[StratumPiece], used_before: list[dt.date],
                stored_rows: int, mine: list[StratumPiece], today_sums: Path | None, exponent: int,
                work_folder: Path | None) -> tuple[dict, pa.Table | pads.Dataset]:
    """:func:`_rebuilt` in ``work_folder`` (the staged totals as a dataset), or in a temporary one (read back)."""
    args = (hook, experiment, stored, used_before, stored_rows, mine, today_sums, exponent)
    if work_folder is not None:
        return _rebuilt(*args, Path(work_folder))
    with tempfile.TemporaryDirectory(prefix="counterbid-window-") as work:
        grams, rows = _rebuilt(*args, Path(work))
        return grams, rows.to_table()


def _rebuilt(hook: ResultsHook, experiment: Experiment, stored: list[StratumPiece], used_before: list[dt.date],
             stored_rows: int, mine: list[StratumPiece], today_sums: Path | None, exponent: int, work: Path
             ) -> tuple[dict, pads.Dataset]:
    """The window's forms and totals from the stored pieces' bidder sums and today's, bucket by bucket of bidders.

    The stored rows are streamed from the sink and set aside with today's by bucket
    (:mod:`.window_rebuild`); each bucket's totals per (segment key, bidder) are added up, their
    Gram form added to the key's (sums over disjoint sets of bidders) and their rows appended to
    ``work/bidder_window_totals.parquet`` (the experiment's label order): memory is set by a
    bucket, not by the window. The same numbers as ``bidder_totals`` and ``gram_of`` over every
    piece, key by key (the plain formula, kept in the tests).
    """
    labels = _labels(experiment)
    segments = sorted({p.key.segment for p in [*stored, *mine] if p.key.segment is not None})
    long_rows = (stored_rows + _today_rows(mine, today_sums)) * len(labels)
    rows = bucket_window(hook.stored_bidder_sum_batches(experiment_id=experiment.id, days=used_before,
                                                        batch_rows=window_rebuild.STREAM_BATCH_ROWS),
                         stored, _today_ranked(mine, today_sums), work / "window", labels=labels, segments=segments,
                         exponent=exponent, bits=bucket_bits(long_rows, window_rebuild.REBUILD_BUCKET_ROWS))
    grams = {key: _empty_gram(len(labels), exponent) for key in [None, *segments]}
    target = work / "bidder_window_totals.parquet"
    writer = pq.ParquetWriter(target, _totals_rows(experiment, None, np.array([], dtype=object),
                                                   np.zeros((0, len(labels)))).schema)
    try:
        for bucket in rows.buckets():
            for key, (ids, sums) in window_bucket_totals(rows, bucket).items():
                grams[key] = _added(grams[key], sums)
                writer.write_table(_totals_rows(experiment, key, ids, sums))
            shutil.rmtree(bucket)
    finally:
        writer.close()
        shutil.rmtree(rows.folder, ignore_errors=True)
    return grams, staged_rows(target)


def _added(gram: BidderGram, sums: np.ndarray) -> BidderGram:
    """``gram`` plus the form of a disjoint set of bidders' totals (``gram_of``: ``sums' sums``)."""
    return BidderGram(gram=gram.gram + sums.T @ sums, n_bidders=gram.n_bidders + int(sums.shape[0]),
                      bid_exponent=gram.bid_exponent)


def _today_ranked(mine: list[StratumPiece], today_sums: Path | None) -> Iterator[Iterable]:
    """Today's pieces with their bidder sums and their positions among today's, one shard at a time."""
    for shard in sorted({int(p.shard) for p in mine}):
        at = [i for i, p in enumerate(mine) if int(p.shard) == shard]
        group = [mine[i] for i in at]
        yield zip(at, group if today_sums is None else staged_piece_rows(group, shard_file(today_sums, shard)))


def _today_groups(mine: list[StratumPiece], today_sums: Path | None) -> Iterator[Iterable]:
    """Today's pieces with their bidder sums, one shard at a time (read label by label from ``today_sums`` when staged)."""
    for shard in sorted({int(p.shard) for p in mine}):
        group = [p for p in mine if int(p.shard) == shard]
        yield group if today_sums is None else staged_piece_rows(group, shard_file(today_sums, shard))


def _today_rows(mine: list[StratumPiece], today_sums: Path | None) -> int:
    """Today's (piece, bidder) rows: from the pieces, or from the counts staged beside their sums."""
    if today_sums is None:
        return sum(int(p.bidder_ids.size) for p in mine)
    return sum(distinct_bidders(today_sums).values())


def _extended_in(hook: ResultsHook, experiment: Experiment, mine: list[StratumPiece], today_sums: Path | None,
                 grams: dict, order: list[str], exponent: int, work_folder: Path | None, *,
                 lookup: bool = True) -> pa.Table | pads.Dataset | None:
    """:func:`_extended` in ``work_folder`` (the staged totals as a dataset), or in a temporary one (read back)."""
    if work_folder is not None:
        return _extended(hook, experiment, mine, today_sums, grams, order, exponent, Path(work_folder), lookup=lookup)
    with tempfile.TemporaryDirectory(prefix="counterbid-window-") as work:
        found = _extended(hook, experiment, mine, today_sums, grams, order, exponent, Path(work), lookup=lookup)
        return None if found is None else found.to_table()


def _extended(hook: ResultsHook, experiment: Experiment, mine: list[StratumPiece], today_sums: Path | None,
              grams: dict, order: list[str], exponent: int, work: Path, *, lookup: bool = True) -> pads.Dataset | None:
    """Extend ``grams`` by today's pieces, bucket by bucket of bidders; today's bidders' totals after the day.

    Today's rows are set aside by bucket (:mod:`.window_buckets`); each bucket's bidders are looked
    up (a join on their integer key in SQL), extended (:func:`extend_gram`, which adds over
    disjoint sets of bidders) and their new totals appended to ``work/bidder_window_totals.parquet``
    (columns of ``sums`` in the stored ``order``): memory is set by a bucket, not by the day.

    ``None`` (``grams`` untouched: the caller rebuilds) when two of the rows found share an integer
    key: two distinct ids collided on it, and only a rebuild (on the id text) keeps them apart.
    ``lookup=False``: the window holds no bidder yet (``grams`` empty): nothing is looked up.
    """
    bits = bucket_bits(_today_rows(mine, today_sums), window_buckets.WINDOW_BUCKET_ROWS)
    rows = bucket_today(_today_groups(mine, today_sums), work / "today", exponent=exponent, bits=bits)
    labels = _labels(experiment)
    permutation, columns = _permutation(order, experiment), [labels.index(label) for label in order]
    running = dict(grams)
    target = work / "bidder_window_totals.parquet"
    writer = pq.ParquetWriter(target, _totals_rows(experiment, None, np.array([], dtype=object),
                                                   np.zeros((0, len(order)))).schema)
    try:
        for bucket in rows.buckets():
            today_totals = bucket_totals(rows, bucket)
            found = hook.bidder_window_totals(experiment_id=experiment.id, today=_lookup_rows(experiment, today_totals)
                                              ) if lookup else None
            if found is not None and _collided(found):
                return None
            for key, totals in today_totals.items():
                stored = _stored_of_key(found, key, len(order)) if found is not None else (
                    np.array([], dtype=object), np.zeros((0, len(order))))
                before, seen = _before(*stored, totals, permutation)
                start = running.get(key, _empty_gram(len(labels), exponent))
                running[key], sums = extend_gram(start, totals, before, seen)
                writer.write_table(_totals_rows(experiment, key, totals.bidder_ids, sums[:, columns]))
            del today_totals, found
    finally:
        writer.close()
    grams.update({k: running[k] for k in sorted(running, key=lambda k: (k is not None, k or ""))})  # pooled first
    return staged_rows(target)


def _collided(found: pa.Table) -> bool:
    """Two found rows on one (segment, integer key): two distinct ids collided on the key."""
    pairs = pd.DataFrame({"segment": found.column("segment").to_pandas(), "key": found.column("bidder_key").to_pandas()})
    return bool(pairs.duplicated().any())


def _inputs(window: list[StratumPiece], grams: dict, write: WindowWrite | None, route: str) -> ToDateInputs:
    """Pooled form (key ``None``) as ``gram``, the segments' as ``segment_grams``."""
    return ToDateInputs(window, grams[None], write, route, {k: g for k, g in grams.items() if k is not None})


def _segment_of(value) -> str | None:
    return None if value is None or pd.isna(value) else str(value)


def _keys_of(rows: pd.DataFrame) -> set[str | None]:
    return {_segment_of(v) for v in rows["segment"]}


def _stored_keys(strata: pd.DataFrame | None) -> set[str | None]:
    """The window keys the stored pieces need: pooled, and each segment of theirs."""
    return {None} | ({_segment_of(v) for v in strata["segment"]} - {None} if strata is not None else set())


def _of_key(frame: pd.DataFrame, key: str | None) -> pd.DataFrame:
    keys = [_segment_of(v) for v in frame["segment"]] if "segment" in frame else []
    return frame[[k == key for k in keys]] if len(frame) else frame


def _empty_gram(size: int, exponent: int) -> BidderGram:
    """The form of a segment with no bidder in the stored window yet."""
    return BidderGram(gram=np.zeros((size, size)), n_bidders=0, bid_exponent=exponent)


def _grams_of_rows(rows: pd.DataFrame, gram_rows: pd.DataFrame, exponent: int, experiment: Experiment
                   ) -> dict[str | None, BidderGram]:
    """The stored forms by key (``None``: pooled; a segment label)."""
    return {_segment_of(seg): _gram_of_rows(_of_key(gram_rows, _segment_of(seg)), int(n), exponent, experiment)
            for seg, n in zip(rows["segment"], rows["n_distinct_bidders"])}


def _lookup_rows(experiment: Experiment, totals: Mapping[str | None, WindowTotals]) -> pa.Table:
    """One row per (segment, bidder) of today: what the stored totals are joined on (SQL computes the key)."""
    return pa.concat_tables([
        pa.table({"experiment_id": repeated(experiment.id, t.bidder_ids.size), "segment": repeated(key, t.bidder_ids.size),
                  "bidder_key": pa.nulls(t.bidder_ids.size, pa.int64()),
                  "bidder_id": pa.array(ids_as_text(t.bidder_ids), pa.string()),
                  "sums": pa.nulls(t.bidder_ids.size, pa.list_(pa.float64()))})
        for key, t in totals.items()])


def _sum_order(rows: pd.DataFrame) -> list[str] | None:
    """The order of the revenue labels in the stored totals' ``sums`` (``None``: not recorded)."""
    value = rows["sum_labels"].iloc[0] if "sum_labels" in rows and len(rows) else None
    return None if value is None or pd.isna(value) or not str(value) else str(value).split(",")


def _permutation(order: list[str], experiment: Experiment) -> np.ndarray:
    """Positions in ``order`` (the stored ``sums``) of the experiment's labels, in the experiment's order."""
    return np.array([order.index(label) for label in _labels(experiment)], dtype=np.intp)


def _stored_of_key(found: pa.Table, key: str | None, width: int) -> tuple[np.ndarray, np.ndarray]:
    """Bidder ids and ``(n, width)`` stored totals (in the stored label order) of one key's found rows."""
    if found.num_rows == 0:
        return np.array([], dtype=object), np.zeros((0, width))
    segment = found.column("segment").cast(pa.string())
    mask = pc.is_null(segment) if key is None else pc.fill_null(pc.equal(segment, key), False)
    part = found.filter(mask)
    if part.num_rows == 0:
        return np.array([], dtype=object), np.zeros((0, width))
    sums = part.column("sums")
    if pc.any(pc.not_equal(pc.list_value_length(sums), width)).as_py():
        raise InputError(f"bidder window: stored totals of segment {key!r} do not hold {width} labels each; "
                         "delete the experiment's bidder_window rows to rebuild it")
    values = pc.list_flatten(sums).to_numpy(zero_copy_only=False).astype(float, copy=False)
    return part.column("bidder_id").to_numpy(zero_copy_only=False), values.reshape(part.num_rows, width)


def _labels(experiment: Experiment) -> list[str]:
    """The bidder sums' columns (``StratumPiece.sum_labels``): each arm's, each what-if layout's, the mixture's revenue."""
    return [name for name, metric in piece_labels(experiment) if metric == REVENUE]


def _gram_of_rows(rows: pd.DataFrame, n_bidders: int, exponent: int, experiment: Experiment) -> BidderGram:
    labels = _labels(experiment)
    index = {name: i for i, name in enumerate(labels)}
    gram = np.full((len(labels), len(labels)), np.nan)
    for a, b, v in zip(rows["arm_i"], rows["arm_j"], rows["value"]):
        gram[index[a], index[b]] = v
    return BidderGram(gram=gram, n_bidders=n_bidders, bid_exponent=exponent)


def _totals_rows(experiment: Experiment, segment: str | None, ids: np.ndarray | pa.Array, sums: np.ndarray) -> pa.Table:
    """One row per bidder, every label's total in the list column ``sums`` (columns of ``sums`` in stored order)."""
    n, width = sums.shape
    values = pa.array(np.ascontiguousarray(sums, dtype=float).reshape(-1), pa.float64())
    offsets = pa.array(np.arange(0, n * width + 1, width, dtype=np.int32), pa.int32())
    return pa.table({"experiment_id": repeated(experiment.id, n), "segment": repeated(segment, n),
                     "bidder_key": pa.nulls(n, pa.int64()),
                     "bidder_id": ids.cast(pa.string()) if isinstance(ids, (pa.Array, pa.ChunkedArray))
                     else pa.array(ids_as_text(np.asarray(ids)), pa.string()),
                     "sums": pa.ListArray.from_arrays(offsets, values)})


def _before(ids: np.ndarray, stored: np.ndarray, totals: WindowTotals, permutation: np.ndarray
            ) -> tuple[np.ndarray, np.ndarray]:
    """The stored totals of today's bidders in today's row order (zeros, unseen, for new bidders).

    ``ids`` and ``stored`` are the found rows (``stored`` in the stored label order); column ``j`` of
    the result is label ``j`` of the experiment, ``stored[:, permutation[j]]``.
    """
    before = np.zeros_like(totals.sums)
    seen = np.zeros(totals.sums.shape[0], dtype=bool)
    if len(ids) == 0:
        return before, seen
    rows = pd.Index(totals.bidder_ids).get_indexer(pd.Index(ids).astype(str))
    if (rows < 0).any():
        raise InputError("bidder window: the stored totals returned a bidder that is not today's")
    before[rows] = stored[:, permutation]
    seen[rows] = True
    return before, seen


def _window_write(experiment: Experiment, mode: str, base_days: str | None, days_text: str, ds: dt.date,
                  grams: Mapping[str | None, BidderGram], totals: Mapping[str | None, tuple[np.ndarray, np.ndarray]],
                  run_id: str, computed_at, *, order: list[str] | None = None,
                  totals_rows: pa.Table | pads.Dataset | None = None) -> WindowWrite:
    """The window's rows: per key (``None``: pooled; a segment label) its description, form and totals.

    ``order``: the label order of the stored totals' ``sums`` (an extension keeps the stored one;
    default the experiment's). ``totals_rows``: the totals' rows as already staged (``totals`` unused).
    """
    labels = _labels(experiment)
    order = list(order or labels)
    columns = [labels.index(label) for label in order]
    last = max(parse_day(d) for d in days_text.split(","))
    when = pd.Timestamp(computed_at).to_pydatetime()
    summary = pa.Table.from_pylist([{
        "experiment_id": experiment.id, "segment": key, "ds": last, "days_used": days_text,
        "n_distinct_bidders": int(gram.n_bidders), "bid_exponent": int(gram.bid_exponent),
        "sum_labels": ",".join(order), "run_id": run_id,
        "computed_at": when} for key, gram in grams.items()])
    gram_rows = pa.Table.from_pylist([{"experiment_id": experiment.id, "segment": key, "arm_i": a, "arm_j": b,
                                       "value": float(gram.gram[i, j])}
                                      for key, gram in grams.items()
                                      for i, a in enumerate(labels) for j, b in enumerate(labels)])
    if totals_rows is None:
        totals_rows = pa.concat_tables([_totals_rows(experiment, key, ids, np.asarray(sums)[:, columns])
                                        for key, (ids, sums) in totals.items()])
    return WindowWrite(mode=mode, base_days=base_days, tables={
        "bidder_window": summary, "bidder_window_gram": gram_rows, "bidder_window_totals": totals_rows})


def stage_window_write(write: WindowWrite | None, folder: Path) -> None:
    """Stage the window's update beside the day's files (removing an earlier attempt's when there is none)."""
    manifest = folder / _MANIFEST
    if write is None:
        manifest.unlink(missing_ok=True)
        return
    for dest in WINDOW_TABLES:
        rows, target = write.tables[dest.destination], folder / f"{dest.destination}.parquet"
        if isinstance(rows, pads.FileSystemDataset) and len(rows.files) == 1:  # staged already: moved, not read
            shutil.move(rows.files[0], target)
        else:
            write_parquet(rows if isinstance(rows, pa.Table) else rows.to_table(), target)
    write_json({"mode": write.mode, "base_days": write.base_days}, manifest)


def load_window_write(folder: Path) -> WindowWrite | None:
    """The staged update of the running window (``None``: the day brings none)."""
    manifest = folder / _MANIFEST
    if not manifest.exists():
        return None
    meta = json.loads(manifest.read_text(encoding="utf-8"))
    return WindowWrite(mode=meta["mode"], base_days=meta["base_days"],
                       tables={d.destination: staged_rows(folder / f"{d.destination}.parquet") for d in WINDOW_TABLES})
