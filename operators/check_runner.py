"""Run every data check of one (experiment, day) on a DuckDB relation, and store the outcomes.

Thin shell: the contract suite is :mod:`counterbid.operators.contract`, the statistical checks are
:func:`counterbid.estimators.checks.equilibrium_checks`; this module fetches frames with the SQL in
``counterbid.sql`` and writes the ``data_checks`` table in one transaction.
"""

from __future__ import annotations

import datetime as dt
import json
import logging
from collections.abc import Callable, Iterable, Mapping
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from counterbid.estimators.checks import (AuctionCounts, CheckResult, bid_quantile_summary, check_config, equilibrium_checks,
                                          worst_failure)
from counterbid.estimators.errors import InputError
from counterbid.estimators.spec import Experiment, parse_day
from counterbid.readers.id_hashes import fnv1a_64
from counterbid.sql import render_sql, validate_identifier

from .contract import run_contract, with_quality
from .results_schema import as_session, migrate

__all__ = ["day_bid_quantiles", "frame_of", "read_check_results", "run_checks", "write_check_results"]

log = logging.getLogger(__name__)


def run_checks(
    con,
    relation: str,
    experiment: Experiment,
    *,
    ds,
    history_relation: str | None = None,
    history_quantiles: pd.DataFrame | None = None,
    config: Mapping[str, Any] | None = None,
    sample_relation: str | None = None,
    sample_shard: tuple[int, int] | None = None,
    shard_relations: Mapping[str, str] | None = None,
    on_bids: Callable[[pd.DataFrame], None] | None = None,
    contract: list[CheckResult] | None = None,
    auction_counts: pd.DataFrame | None = None,
    outlier_scan: Callable[[Mapping[int, float]], pd.DataFrame] | None = None,
) -> list[CheckResult]:
    """Every data check of one experiment's day: the contract suite, then the statistical checks.

    Parameters
    ----------
    con : duckdb.DuckDBPyConnection
        Connection holding the day's bids of ``experiment`` as a table or view.
    relation : str
        Name of that table or view (plain identifier; validated and quoted).
    experiment : Experiment
    ds : date-like
        The day checked.
    history_relation : str, optional
        Table or view (same connection) with earlier days' bids and a ``ds`` column, any
        experiments; the ``drift.trailing_days`` days before ``ds`` are compared with today.
    history_quantiles : pandas.DataFrame, optional
        The trailing days' stored bid-quantile summaries instead (rows of
        :func:`counterbid.estimators.checks.bid_quantile_summary` with a ``ds`` column; what the
        pipeline keeps, so that no step re-reads an earlier day's bids). Used when
        ``history_relation`` is not given.
    config : mapping, optional
        Threshold overrides on top of ``experiment.checks`` (see ``DEFAULT_CHECKS``).
    sample_relation : str, optional
        Table or view (same connection) holding a hash sample of whole auctions of the day (one
        shard of a day staged in several). The counting checks (``sample_ratio``, the minimum
        samples) still count the whole ``relation`` in DuckDB (``sql/check_auction_counts.sql``);
        the distribution checks (``monotone_values``, ``shading``, ``drift``) load only the
        sample, so the frame in memory is one shard, its text ids as 64-bit hashes (flagged bids
        are named by the whole-day scan), and with ``sample_shard`` a shard above
        :data:`MAX_SAMPLE_BIDS` bids cut to whole auctions, 1 in k by a hash of the id
        (``details["sample"]["auctions_every"]``). Default: they load ``relation``.
    sample_shard : (int, int), optional
        ``(shard, shards)`` the sample is, recorded with the bids used and the day's bids in
        ``details["sample"]`` of each distribution check.
    shard_relations : mapping of str to str, optional
        The day as relations (same connection) of whole auctions, its shards (name -> the files
        it reads). The per-auction statements (the contract's aggregates and suite, the auction
        counts, the scan for bids above the outlier fences) then run one shard at a time and
        their outcomes are added up: the same outcomes, with memory set by a shard rather than
        the day (an auction lies in one shard). Default: they run on ``relation`` at once.
    on_bids : callable, optional
        Called with the frame of bids the distribution checks read (the sample, or the day) once
        they ran and no ``error`` check failed: what the pipeline summarises for later days' drift
        check (:func:`~counterbid.estimators.checks.bid_quantile_summary`) without reading the
        bids a second time.
    contract : list of CheckResult, optional
        The contract suite's outcomes, run elsewhere on the same day (the Spark validate step:
        :func:`counterbid.operators.spark_contract.run_contract_on_spark`); default: run here on
        ``relation`` (or ``shard_relations``).
    auction_counts : pandas.DataFrame, optional
        With ``sample_relation``: the whole day's auctions per arm and number of bidders (columns
        ``arm``, ``n_bidders``, ``n_auctions``), counted elsewhere (Spark SQL); default: counted here.
    outlier_scan : callable, optional
        With ``sample_relation``: given the sample's outlier fences (number of bidders -> fence),
        the whole day's bids above them (the frame of ``sql/check_bids_above_fence.sql``), found
        elsewhere; default: scanned here.

    Returns
    -------
    list of CheckResult
        Contract checks first. When a contract check of severity ``error`` fails, the
        statistical checks are not run (their inputs are not trustworthy).

    Raises
    ------
    InputError
        Bad relation name, bad ``ds`` or bad threshold configuration.
    """
    validate_identifier(relation, what="relation")
    if history_relation is not None:
        validate_identifier(history_relation, what="history_relation")
    if sample_relation is not None:
        validate_identifier(sample_relation, what="sample_relation")
    for name in shard_relations or {}:
        validate_identifier(name, what="shard relation")
    day = parse_day(ds)
    cfg = check_config(experiment.checks, config, source=f"experiment {experiment.id!r} checks")
    results = (list(contract) if contract is not None
               else run_contract(con, relation, experiment, config=cfg, shards=shard_relations))
    pieces = list(shard_relations) if shard_relations else [relation]
    if not any(r.check == "contract_types" and not r.passed for r in results):  # the columns are there
        relation = with_quality(con, relation)  # quality 1 when the log has none: every check ranks by bid x quality
        if history_relation is not None:
            history_relation = with_quality(con, history_relation)
        if sample_relation is not None:
            sample_relation = with_quality(con, sample_relation)
    if any(not r.passed and r.severity == "error" for r in results):
        log.warning("%s %s: contract failed; statistical checks not run", experiment.id, day)
        return results
    counts = sample = None
    if sample_relation is not None:
        try:  # the whole day's auctions per arm and number of bidders, counted in DuckDB
            counted = auction_counts if auction_counts is not None else _auction_counts(con, pieces)
            counts = AuctionCounts.from_frame(counted, experiment, source=relation)
        except InputError as exc:
            return results + [CheckResult("equilibrium_inputs", "error", False, None, None, {"error": str(exc)})]
    every = 1 if counts is None or sample_shard is None else sample_auctions_every(counts.day_bids, sample_shard[1])
    # with a sample, flagged bids are named from the day's text (the outlier scan): the frame's ids only group
    bids = _day_bids(con, sample_relation or relation, experiment, hashed_ids=sample_relation is not None,
                     auctions_every=every)
    if counts is not None:
        shard, shards = sample_shard if sample_shard is not None else (None, None)
        sample = {"shard": shard, "shards": shards, "bids_used": len(bids), "day_bids": counts.day_bids,
                  "method": "hash sample of whole auctions (md5 of auction_id)"}
        if every > 1:
            sample |= {"auctions_every": every, "method": sample["method"] + f", then 1 auction in {every} (md5 of auction_id, hex digits 9-16)"}
        log.info("%s %s: distribution checks on shard %s of %s (%d of %d bids)", experiment.id, day, shard, shards,
                 len(bids), counts.day_bids)
    history = None
    if history_relation is not None:
        first = day - dt.timedelta(days=int(cfg["drift"]["trailing_days"]))
        history = _bids_frame(
            con, render_sql("check_trailing_bids", relation=history_relation),
            {"experiment_id": experiment.id, "first_day": first, "ds": day},
        )
        if history.empty:
            history = None
    elif history_quantiles is not None and not history_quantiles.empty:
        history = history_quantiles
    outliers = None if sample_relation is None else (
        outlier_scan or (lambda fences: _bids_above_fences(con, pieces, fences)))
    try:
        results += equilibrium_checks(bids, experiment, ds=day, history=history, config=cfg,
                                      source=sample_relation or relation, counts=counts, sample=sample,
                                      outliers=outliers)
    except InputError as exc:  # a contract check configured as a warning let broken data through
        results.append(CheckResult("equilibrium_inputs", "error", False, None, None, {"error": str(exc)}))
    if on_bids is not None and worst_failure(results) != "error":
        on_bids(bids)
    return results


#: Most bids the distribution checks of a sampled day read: a larger sample shard is cut to whole auctions
#: whose cut key (md5 of the id, hex digits 9-16) is 0 modulo ``ceil(shard bids / this)`` (``sql/check_day_bids.sql``;
#: the Spark validate step cuts by the same rule), so the checks'
#: frame, and the step's peak memory, stay those of about 2M bids whatever ``max_bids_per_shard`` is.
MAX_SAMPLE_BIDS = 2_000_000


def sample_auctions_every(day_bids: int, shards: int) -> int:
    """1 auction in how many of the sample shard the distribution checks read (1: the whole shard).

    The shards split the day by a hash of the auction id, so a shard holds about ``day_bids / shards`` bids.
    """
    per_shard = -(-int(day_bids) // max(int(shards), 1))
    return max(1, -(-per_shard // MAX_SAMPLE_BIDS))


#: Most outlying bids of a day the checks read back (they name ten; the rest only add to the share).
MAX_FLAGGED_BIDS = 100_000


def _auction_counts(con, relations: list[str]) -> pd.DataFrame:
    """Auctions per arm and number of bidders (``sql/check_auction_counts.sql``), relation by relation, added up.

    Each relation holds whole auctions (a shard), so the counts add; DuckDB groups one shard at a time.
    """
    frames = [con.sql(render_sql("check_auction_counts", relation=with_quality(con, r))).df() for r in relations]
    if len(frames) == 1:
        return frames[0]
    total = pd.concat(frames, ignore_index=True).groupby(["arm", "n_bidders"], as_index=False)["n_auctions"].sum()
    return total.sort_values(["arm", "n_bidders"], ignore_index=True)


def _bids_above_fences(con, relations: list[str], fences: Mapping[int, float]) -> pd.DataFrame:
    """The whole day's bids above the sample's outlier fences (``sql/check_bids_above_fence.sql``), shard by shard.

    Highest first within each number of bidders, at most :data:`MAX_FLAGGED_BIDS` of them.
    """
    table = pd.DataFrame({"n_bidders": pd.Series(list(fences), dtype="int64"),
                          "fence": pd.Series(list(fences.values()), dtype="float64")})
    con.register("outlier_fences", table)
    try:
        found = [con.sql(render_sql("check_bids_above_fence", relation=with_quality(con, r), fences="outlier_fences"),
                         params={"max_flagged": MAX_FLAGGED_BIDS}).df() for r in relations]
    finally:
        con.unregister("outlier_fences")
    if len(found) == 1:
        return found[0]
    above = pd.concat(found, ignore_index=True)
    above = above.sort_values(["n_bidders", "effective_bid"], ascending=[True, False], kind="stable", ignore_index=True)
    return above.head(MAX_FLAGGED_BIDS)


def day_bid_quantiles(con, relation: str, experiment: Experiment) -> pd.DataFrame:
    """The day's bid-quantile summary (:func:`~counterbid.estimators.checks.bid_quantile_summary`) of a relation.

    Run after :func:`run_checks` passed the contract: the bids are read again from the DuckDB
    relation (the checks' frame is gone by then, so the peak is one frame). On a day staged in
    several shards the pipeline passes the same hash sample the distribution checks read (its
    ``n_bids`` are the sample's, which is what the drift test's effective size needs).
    """
    validate_identifier(relation, what="relation")
    relation = with_quality(con, relation)
    bids = _day_bids(con, relation, experiment, hashed_ids=True)  # the summary reads bids and auction sizes only
    return bid_quantile_summary(bids, experiment, source=relation)


#: Id columns the checks' frame may hold as 64-bit hashes of their text (``readers/id_hashes.py``).
HASHED_ID_COLUMNS = ("auction_id", "bidder_id")


def _day_bids(con, relation: str, experiment: Experiment, *, hashed_ids: bool, auctions_every: int = 1) -> pd.DataFrame:
    """The checks' bids of ``relation`` (``sql/check_day_bids.sql``): the contract's columns and the
    experiment's auction-level columns; text ids as 64-bit hashes when ``hashed_ids``; with
    ``auctions_every`` k > 1, the auctions whose id hashes to 0 modulo k (whole auctions).

    Hashed ids serve where the ids only group bids (auction sizes, bidders): 8 bytes a bid instead
    of a dictionary of text. Two distinct ids share a hash with probability at most
    ``n (n - 1) / 2**65`` over ``n`` distinct ids (2.7e-8 at 10**6; ``readers/id_hashes.py``).
    """
    statement = render_sql("check_day_bids", relation=relation)
    return _bids_frame(con, statement, {"auction_columns": list(experiment.auction_columns),
                                        "auctions_every": int(auctions_every)},
                       hashed=HASHED_ID_COLUMNS if hashed_ids else ())


#: Rows per batch when the checks' bids are fetched from DuckDB (strings are dictionary-encoded batch by batch).
FETCH_BATCH_ROWS = 1 << 20


def _is_text(column) -> bool:
    return pa.types.is_string(column.type) or pa.types.is_large_string(column.type)


def _hashed(column: pa.Array) -> pa.Array:
    """FNV-1a hashes (int64) of a text column, one hash per distinct value of the batch (nulls stay null)."""
    encoded = pc.dictionary_encode(column)
    indices = encoded.indices
    codes = indices.fill_null(0).to_numpy(zero_copy_only=False) if indices.null_count else indices.to_numpy()
    hashes = fnv1a_64(encoded.dictionary) if len(encoded.dictionary) else np.zeros(1, dtype=np.int64)
    mask = indices.is_null().to_numpy(zero_copy_only=False) if indices.null_count else None
    return pa.array(hashes[codes], type=pa.int64(), mask=mask)


def _bids_frame(con, statement: str, params: Mapping[str, Any] | None = None, *,
                hashed: tuple[str, ...] = ()) -> pd.DataFrame:
    """Rows of ``statement`` as a frame with string columns as categoricals (not Python objects).

    Fetched in batches of :data:`FETCH_BATCH_ROWS`, each string column dictionary-encoded as it
    arrives (the dictionaries unified at the end), so that the plain text of the ids is never held
    for the whole frame at once. Text columns named in ``hashed`` become their 64-bit FNV-1a
    hashes instead (a null stays null, for the checks to report).
    """
    reader = con.sql(statement, params=dict(params or {})).to_arrow_reader(FETCH_BATCH_ROWS)
    schema, batches = reader.schema, []
    for batch in reader:
        columns = [(_hashed(c) if name in hashed else pc.dictionary_encode(c)) if _is_text(c) else c
                   for name, c in zip(batch.schema.names, batch.columns)]
        batches.append(pa.RecordBatch.from_arrays(columns, names=batch.schema.names))
    del reader  # DuckDB's result and its buffers go before the frame is built
    if not batches:
        table = schema.empty_table()
        for i, field in enumerate(table.schema):
            if pa.types.is_string(field.type) or pa.types.is_large_string(field.type):
                empty = pa.array([], pa.int64()) if field.name in hashed else pc.dictionary_encode(table.column(i))
                table = table.set_column(i, field.name, empty)
    else:
        table = pa.Table.from_batches(batches).unify_dictionaries()
    del batches
    frame = frame_of(table)
    del table
    pa.default_memory_pool().release_unused()  # hand the Arrow buffers back before the checks allocate theirs
    return frame


def frame_of(table: pa.Table) -> pd.DataFrame:
    """``table.to_pandas()`` with its dictionary columns as categoricals built straight from the dictionary.

    Arrow's conversion checks that each dictionary's values are distinct (a hash of every text
    value: about 1 s for a 1M-bid day's bidder ids) and copies them; an Arrow dictionary, unified
    across batches, is distinct by construction, so the categories are taken as they are (sharing
    Arrow's buffers, as do the codes). The same frame, values, dtypes and codes
    (tests/operators/test_check_frame.py checks it against ``to_pandas``); other columns convert as
    ``to_pandas`` converts them.
    """
    columns = {}
    for name, column in zip(table.schema.names, table.columns):
        columns[name] = (_categorical(column) if pa.types.is_dictionary(column.type)
                         else column.to_pandas())
    return pd.DataFrame(columns, index=pd.RangeIndex(table.num_rows))


def _categorical(column: pa.ChunkedArray) -> pd.Categorical:
    """One dictionary column as a pandas Categorical: codes from the indices (null: -1), categories the dictionary."""
    first = column.chunk(0).dictionary if column.num_chunks else None
    if first is None or len(first) == 0 or any(c.dictionary.null_count for c in column.chunks):
        return column.to_pandas().array  # nothing to hash, or a null category pandas refuses: Arrow's own conversion
    merged = column.combine_chunks() if column.num_chunks != 1 else column.chunk(0)
    categories = pd.Index(merged.dictionary.to_pandas())
    dtype = pd.CategoricalDtype._from_fastpath(categories, bool(column.type.ordered))
    indices = merged.indices.fill_null(-1) if merged.indices.null_count else merged.indices
    codes = indices.to_numpy(zero_copy_only=False)
    if not codes.flags.writeable:  # a view of Arrow's buffer: pandas may write to its codes
        codes = codes.copy()
    return pd.Categorical.from_codes(codes, dtype=dtype, validate=False)


def write_check_results(
    con,
    results: Iterable[CheckResult],
    *,
    experiment_id: str,
    ds,
    run_id: str | None = None,
    schema: str = "main",
    checked_at: dt.datetime | None = None,
) -> int:
    """Replace the stored outcomes of one (experiment, day) with ``results``, in one transaction.

    Parameters
    ----------
    con : ResultsSession or duckdb.DuckDBPyConnection
        The results database (DuckDB or PostgreSQL session from ``ResultsHook.session``, or a
        DuckDB connection), not inside an open transaction. The schema is migrated first.
    results : iterable of CheckResult
    experiment_id : str
    ds : date-like
    run_id : str, optional
        Airflow run id (or any label of the run that produced the outcomes).
    schema : str, optional
        Schema of the ``data_checks`` table (validated identifier), default ``main``.
    checked_at : datetime, optional
        Defaults to now (UTC).

    Returns
    -------
    int
        Rows written.

    Notes
    -----
    Delete-then-insert of the (experiment, day) inside ``begin ... commit``: re-running a day
    leaves exactly one row per check, and a failure rolls back to the previous rows.
    """
    day = parse_day(ds)
    stamp = checked_at or dt.datetime.now(dt.timezone.utc)
    rows = [
        {
            "experiment_id": str(experiment_id),
            "ds": day,
            "check": r.check,
            "severity": r.severity,
            "passed": bool(r.passed),
            "observed": r.observed,
            "threshold": r.threshold,
            "details": json.dumps(dict(r.details), sort_keys=True, default=str),
            "run_id": run_id,
            "checked_at": stamp,
        }
        for r in results
    ]
    names = [row["check"] for row in rows]
    if len(set(names)) != len(names):
        dup = next(n for n in names if names.count(n) > 1)
        raise InputError(f"check results for {experiment_id} {day} name check {dup!r} twice")
    session = as_session(con, schema=schema)
    migrate(session)
    with session.transaction():
        session.lock_partition("checks", experiment_id=str(experiment_id), ds=day)
        session.execute("data_checks_delete", {"experiment_id": str(experiment_id), "ds": day})
        for row in rows:
            session.execute("data_checks_insert", row)
    return len(rows)


def read_check_results(con, *, experiment_id: str, ds, schema: str = "main"):
    """Stored outcomes of one (experiment, day) as a DataFrame (failures first)."""
    return as_session(con, schema=schema).fetch_df(
        "data_checks_select", {"experiment_id": str(experiment_id), "ds": parse_day(ds)})
