"""The DAG's load and validate steps on Spark: nothing of the day is copied onto the Airflow worker.

* :func:`record_spark_day` (the Spark load step) checks the day's partition exists (a missing one is
  late data: :class:`~counterbid.operators.partition.MissingPartitionError`, retried), and records
  in the staging folder's day manifest the day's file fingerprint, its column types from the
  Parquet metadata, its bids and its shards (:func:`~counterbid.estimators.n_shards`, the local
  route's rule). Measured position weights come from the click log as on the local route.
* :func:`run_spark_partition_checks` (the Spark validate step) runs the schema gate's rules
  (:func:`~counterbid.operators.schema_gate.gate_checks`) on Spark SQL answers, the contract
  suite through Great Expectations' Spark data source
  (:func:`~counterbid.operators.spark_contract.run_contract_on_spark`), the counting checks on
  auction counts grouped in Spark SQL, and the distribution checks
  (:func:`~counterbid.operators.check_runner.run_checks`) on a hash sample of whole auctions,
  the only bids that reach the driver (at most about
  :data:`~counterbid.operators.check_runner.MAX_SAMPLE_BIDS`). The outlier scan of the whole day
  runs on Spark.

Needs the ``spark`` extra; ``pyspark`` is imported when a function runs, not with this module.
"""

from __future__ import annotations

import datetime as dt
import json
import logging
import time
from dataclasses import dataclass
from typing import Any

import pandas as pd

from counterbid.estimators import CheckResult, Experiment, n_shards, worst_failure
from counterbid.estimators.bid_contract import INTEGER_RANGE
from counterbid.estimators.checks import bid_quantile_summary
from counterbid.estimators.errors import InputError
from counterbid.readers.shards import max_bids_per_shard as max_bids_per_shard_setting
from counterbid.sql import statement

from . import check_runner
from .check_runner import MAX_FLAGGED_BIDS, run_checks, sample_auctions_every
from .hooks import ResultsHook
from .lake_hook import LakeHook
from .partition import (MissingPartitionError, stage_bid_quantiles, stage_measured_weights, staged_experiment,
                        trailing_history)
from .schema_gate import gate_checks
from .spark_contract import duckdb_type_name, run_contract_on_spark, spark_auction_counts
from .staging import StagedPartition, replace_folder, write_json

__all__ = ["CHECK_STATEMENT_PARAMETERS", "SPARK_DAY", "changed_files", "read_spark_day", "record_spark_day", "run_spark_partition_checks"]

log = logging.getLogger(__name__)

#: The manifest's ``engine`` of a day the Spark load step recorded (no bid files staged).
SPARK_DAY = "spark"
#: Views the statements of this module read.
GATE_VIEW, GATE_VALUES_VIEW = "counterbid_gate_bids", "counterbid_gate_values"
SOURCE_VIEW, DAY_VIEW, FENCES_VIEW = "counterbid_check_source", "counterbid_check_day", "counterbid_outlier_fences"
#: Every statement this module runs (``sql/<name>.spark.sql``) and the ``:name`` parameters it binds.
CHECK_STATEMENT_PARAMETERS = {
    "spark_gate_arm_counts": frozenset(),
    "spark_gate_null_counts": frozenset(),
    "spark_gate_quality_faults": frozenset(),
    "spark_gate_integer_range": frozenset({"low", "high"}),
    "spark_check_day": frozenset({"n_shards"}),
    "spark_check_shard_auctions": frozenset(),
    "spark_check_sample_bids": frozenset({"sample_shard", "auctions_every"}),
    "spark_check_bids_above_fence": frozenset({"max_flagged"}),
}


def _run_sql(spark, name: str, **args):
    """Spark's frame of ``sql/<name>.spark.sql`` with ``args`` bound (exactly its parameters)."""
    if set(args) != CHECK_STATEMENT_PARAMETERS[name]:  # a programming error, not an input's
        raise ValueError(f"statement {name!r} binds {sorted(CHECK_STATEMENT_PARAMETERS[name])}; got {sorted(args)}")
    text = statement(name, dialect="spark")
    return spark.sql(text, args=args) if args else spark.sql(text)


#: Columns the distribution checks read (``sql/check_day_bids.sql``), besides the experiment's auction columns.
SAMPLE_COLUMNS = ("experiment_id", "auction_id", "bidder_id", "arm", "bid", "position", "quality")


def _missing(exc: InputError) -> bool:
    return str(exc).endswith("is missing (no such folder)")


def record_spark_day(spark, lake: LakeHook, *, lake_root: str, experiment: Experiment, ds: dt.date,
                     staging_root: str, clicks_root: str | None = None, click_window_days: int = 7,
                     max_bids_per_shard: int | str | None = None) -> dict:
    """The Spark load step of one (experiment, day): record the day, copy none of it.

    Parameters
    ----------
    spark : pyspark.sql.SparkSession
    lake : LakeHook
        Reads the click log when an arm's position weights are ``measured``.
    lake_root : str
        Root of the bid lake as Spark reads it.
    experiment, ds, staging_root, clicks_root, click_window_days, max_bids_per_shard
        As :func:`counterbid.operators.partition.stage_partition`.

    Returns
    -------
    dict
        ``{"day_bids", "shards", "max_bids_per_shard", "files", "folder", "measured_arms"}``.

    Raises
    ------
    MissingPartitionError
        The day's folder does not exist (yet): retryable.
    InputError
        The day cannot be read, or has no ``experiment_id`` column.
    """
    from counterbid.readers.spark_lake_day import lake_day_files

    staged = StagedPartition.at(staging_root, experiment.id, ds)
    max_bids = max_bids_per_shard_setting(max_bids_per_shard)
    try:
        day = lake_day_files(spark, lake_root, experiment=experiment, ds=ds)
    except InputError as exc:
        if _missing(exc):  # late data: retried, and nothing of an earlier try is left
            replace_folder(lambda folder: folder.mkdir(), staged.day)
            raise MissingPartitionError(str(exc)) from None
        raise
    shards = n_shards(day.experiment_rows, max_bids)
    manifest = {"engine": SPARK_DAY, "shards": shards, "day_bids": day.experiment_rows, "max_bids_per_shard": max_bids,
                "lake_root": str(lake_root), "columns": day.columns, "files": day.fingerprint()}

    def fill(folder) -> None:  # the manifest alone: no bid file on the worker
        folder.mkdir()
        write_json(manifest, folder / staged.day_manifest.name)

    replace_folder(fill, staged.day)
    measured = stage_measured_weights(lake, experiment=experiment, ds=ds, staged=staged, clicks_root=clicks_root,
                                      click_window_days=click_window_days)
    return {"day_bids": day.experiment_rows, "shards": shards, "max_bids_per_shard": max_bids,
            "files": len(day.files), "folder": str(staged.folder),
            "measured_arms": [] if measured is None else list(dict.fromkeys(measured["arm"]))}


def read_spark_day(staged: StagedPartition) -> dict:
    """The manifest the Spark load step recorded; refuses a day staged by the local load step."""
    manifest = json.loads(staged.require(staged.day_manifest, step="load").read_text(encoding="utf-8"))
    if manifest.get("engine") != SPARK_DAY:
        raise InputError(f"{staged.day_manifest}: the day was staged by the local load step, not recorded by the "
                         "Spark one; run the day again from the 'load' step")
    return manifest


def changed_files(recorded: list[dict], found: list[dict]) -> str | None:
    """How the day's files differ from the load step's fingerprint (one line), or ``None`` when they do not."""
    before, after = {f["path"]: f for f in recorded}, {f["path"]: f for f in found}
    if before == after:
        return None
    gone, new = sorted(set(before) - set(after)), sorted(set(after) - set(before))
    altered = sorted(p for p in set(before) & set(after) if before[p] != after[p])
    for what, paths in (("removed", gone), ("added", new), ("changed (size or rows)", altered)):
        if paths:
            return f"{len(paths)} file(s) {what} since the load step, first {paths[0]}"
    return None


@dataclass(frozen=True)
class SparkGateInputs:
    """The schema gate's inputs from the lake day on Spark (:class:`~counterbid.operators.schema_gate.GateInputs`).

    ``day`` carries each row's ``bid_file`` and ``bid_row``; ``columns`` are the Spark types the
    load step read from the Parquet metadata.
    """

    spark: Any
    day: Any
    spark_columns: dict[str, str]

    def _frame(self, name: str, **args) -> pd.DataFrame:
        self.day.createOrReplaceTempView(GATE_VIEW)
        return _run_sql(self.spark, name, **args).toPandas()

    def columns(self) -> dict[str, str]:
        return {name: duckdb_type_name(kind) for name, kind in self.spark_columns.items()}

    def integer_range(self, column: str) -> tuple[int, str | None]:
        self.day.select(self.day[column].alias("gate_value")).createOrReplaceTempView(GATE_VALUES_VIEW)
        low, high = INTEGER_RANGE
        (row,) = _run_sql(self.spark, "spark_gate_integer_range", low=str(low), high=str(high)).collect()
        return int(row["outside"]), row["example"]

    def arm_counts(self) -> pd.DataFrame:
        counts = self._frame("spark_gate_arm_counts")
        return counts.astype({"arm": object, "n_auctions": "int64", "n_bids": "int64"})

    def null_counts(self) -> dict[str, int]:
        (row,) = self._frame("spark_gate_null_counts").to_dict("records")
        return {name: int(value) for name, value in row.items()}

    def quality_faults(self) -> tuple[int, str | None, int | None, str | None, str | None]:
        (row,) = self._frame("spark_gate_quality_faults").to_dict("records")
        first_row = row["first_row"]
        return (int(row["n_faults"]), row["first_file"], None if pd.isna(first_row) else int(first_row),
                row["first_auction"], row["first_quality"])


def _check_day(spark, bids, *, shards: int):
    """The day with quality 1 when the log has none, each bid's shard and cut key, as the view :data:`DAY_VIEW`."""
    from pyspark.sql import functions as F

    if "quality" not in bids.columns:
        bids = bids.withColumn("quality", F.lit(1.0).cast("double"))
    bids.createOrReplaceTempView(SOURCE_VIEW)
    day = _run_sql(spark, "spark_check_day", n_shards=int(shards))
    day.createOrReplaceTempView(DAY_VIEW)
    return day


def _outlier_scan(spark):
    """The whole day's bids above the sample's fences, found on Spark (``run_checks``'s ``outlier_scan``)."""

    def scan(fences) -> pd.DataFrame:
        table = pd.DataFrame({"n_bidders": pd.Series(list(fences), dtype="int64"),
                              "fence": pd.Series(list(fences.values()), dtype="float64")})
        spark.createDataFrame(table, "n_bidders long, fence double").createOrReplaceTempView(FENCES_VIEW)
        found = _run_sql(spark, "spark_check_bids_above_fence", max_flagged=MAX_FLAGGED_BIDS).toPandas()
        return found.astype({"n_bidders": "int64", "bid": "float64", "effective_bid": "float64"})

    return scan


def _sample_table(spark, experiment: Experiment, *, sample: int, every: int):
    """The sample's bids (shard ``sample``, 1 auction in ``every``) as an Arrow table on the driver."""
    day = spark.table(DAY_VIEW)
    wanted = [c for c in (*SAMPLE_COLUMNS, *experiment.auction_columns) if c in day.columns]
    frame = _run_sql(spark, "spark_check_sample_bids", sample_shard=int(sample), auctions_every=int(every))
    return frame.select(*dict.fromkeys(wanted)).toArrow()


def run_spark_partition_checks(spark, hook: ResultsHook, *, lake_root: str, experiment: Experiment,
                               staged: StagedPartition, ds: dt.date) -> list[CheckResult]:
    """Every check of one (experiment, day) before it is estimated, on Spark: the local route's checks and rows.

    Parameters
    ----------
    spark : pyspark.sql.SparkSession
    hook : ResultsHook
        The results sink (the trailing days' bid-quantile summaries of the drift check).
    lake_root : str
        Root of the bid lake as Spark reads it.
    experiment : Experiment
    staged : StagedPartition
        Where the Spark load step recorded the day (:func:`record_spark_day`).
    ds : datetime.date

    Returns
    -------
    list of CheckResult
        As :func:`counterbid.operators.partition.run_partition_checks`: the schema gate, then the
        contract, then the statistical checks. The distribution checks read shard ``s`` of the
        load step's shards, ``s`` the first shard holding an auction with two bids or more, cut to
        1 auction in :func:`~counterbid.operators.check_runner.sample_auctions_every` by the
        auction id's cut key (the local route's rule); a day of one shard within
        :data:`~counterbid.operators.check_runner.MAX_SAMPLE_BIDS` bids is read whole, as locally
        (a day of one larger shard is sampled here, where the local route reads it whole). When
        no error check failed, the day's bid-quantile summary of that sample is staged.
    """
    from counterbid.readers.spark_shards import lake_day_frame

    import duckdb

    manifest = read_spark_day(staged)
    source = f"{lake_root} ds={ds}"
    phase = _Phases(f"{experiment.id} {ds}")
    day = lake_day_frame(spark, lake_root, experiment=experiment, ds=ds, source=source)
    results = gate_checks(SparkGateInputs(spark, day, manifest["columns"]), experiment=experiment)
    phase("schema gate")
    if worst_failure(results) == "error":
        return results
    experiment, _ = staged_experiment(experiment, staged)
    history = trailing_history(hook, experiment=experiment, ds=ds)
    staged.bid_quantiles.unlink(missing_ok=True)
    bids = day.drop("bid_file", "bid_row")
    contract = run_contract_on_spark(spark, bids, experiment, source=source)
    phase("contract suite")
    if worst_failure(contract) == "error":  # run_checks stops here too: the statistical checks' inputs are not trustworthy
        log.warning("%s %s: contract failed; statistical checks not run", experiment.id, ds)
        return results + contract
    shards, day_bids = int(manifest["shards"]), int(manifest["day_bids"])
    _check_day(spark, bids, shards=shards)
    sampled = shards > 1 or day_bids > check_runner.MAX_SAMPLE_BIDS
    counts = sample = None
    every = 1
    if sampled:
        counts = spark_auction_counts(spark, bids)
        estimable = [int(r["shard"]) for r in _run_sql(spark, "spark_check_shard_auctions").collect()]
        sample = estimable[0] if estimable else 0
        every = sample_auctions_every(day_bids, shards)
    phase("auction counts and sample shard")
    table = _sample_table(spark, experiment, sample=sample or 0, every=every)
    phase("sample to the driver")
    log.info("%s %s: %d of %d bids to the driver for the distribution checks (shard %s of %s, 1 auction in %d)",
             experiment.id, ds, table.num_rows, day_bids, sample, shards, every)
    summaries: list[pd.DataFrame] = []

    def summarise(frame: pd.DataFrame) -> None:
        summaries.append(bid_quantile_summary(frame, experiment, source=source))

    # the relations are named as on the local route, so that messages and details read the same
    with duckdb.connect() as con:
        con.register("spark_sample", table)
        con.sql("select * from spark_sample").to_view("staged_day")
        if sampled:
            con.sql("select * from spark_sample").to_view("staged_sample")
        results += list(run_checks(con, "staged_day", experiment, ds=ds, history_quantiles=history,
                                   sample_relation="staged_sample" if sampled else None,
                                   sample_shard=(sample, shards) if sampled else None, on_bids=summarise,
                                   contract=contract, auction_counts=counts,
                                   outlier_scan=_outlier_scan(spark) if sampled else None))
    del table
    phase("statistical checks")
    stage_bid_quantiles(staged, summaries, results, experiment_id=experiment.id, ds=ds)
    return results


class _Phases:
    """Logs each phase's wall and driver CPU seconds (where a validate step's time goes)."""

    def __init__(self, where: str) -> None:
        self.where, self.wall, self.cpu = where, time.perf_counter(), time.process_time()

    def __call__(self, name: str) -> None:
        wall, cpu = time.perf_counter(), time.process_time()
        log.info("%s: %s took %.2f s (driver CPU %.2f s)", self.where, name, wall - self.wall, cpu - self.cpu)
        self.wall, self.cpu = wall, cpu
