"""The estimate step on a Spark cluster, through the Apache Spark provider of Airflow.

:class:`SparkEstimateArmsOperator` is :class:`~counterbid.operators.pipeline.EstimateArmsOperator`
run by the provider's ``PySparkOperator``: the provider builds the Spark session from an Airflow
connection (host = master URL such as ``spark://host:7077``, ``yarn`` or ``local[4]``; a
``spark_connect`` connection or an ``sc://`` host = Spark Connect; the connection's extras = Spark
settings), hands it to the step and stops it when the step ends. Spark reads the day's partition
of the lake itself, splits it into the shards the load step staged (the same md5 hash of the
auction id) and estimates the shards in parallel; the driver combines the pieces, and everything
after (the experiment to date, the staged files the write step stores) is the local engine's code.

The load and validate steps of the Spark setting run on the same provider session:
:class:`SparkLoadPartitionOperator` records the day's file fingerprint, column types, bids and
shards without copying any of it, and :class:`SparkValidatePartitionOperator` runs the checks on
Spark (:mod:`counterbid.operators.spark_checks`) and records them as the local validate step
does. The estimate step first takes the fingerprint again: a day whose files changed after the
load step is refused.

Needs the ``spark`` extra (``pip install 'counterbid[spark]'``): this module imports the provider.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from airflow.providers.apache.spark.operators.spark_pyspark import PySparkOperator

from airflow.sdk.exceptions import AirflowFailException

from counterbid.estimators.errors import InputError

from .pipeline import EstimateArmsOperator, LoadPartitionOperator, ValidatePartitionOperator, log
from .staging import StagedPartition

__all__ = ["SparkEstimateArmsOperator", "SparkLoadPartitionOperator", "SparkValidatePartitionOperator"]


def _unchanged_day(task: "SparkEstimateArmsOperator", spark) -> None:
    """Refuse a day whose files changed after the Spark load step recorded them (a day the local load step staged
    has no fingerprint: its shards are checked by their bids, as before)."""
    import json

    from counterbid.readers.spark_lake_day import lake_day_files

    from .spark_checks import SPARK_DAY, changed_files

    experiment, day = task.experiment(), task.day()
    staged = StagedPartition.at(task.staging_root, experiment.id, day)
    if not staged.day_manifest.exists():
        return  # the estimate step names the missing load step itself
    manifest = json.loads(staged.day_manifest.read_text(encoding="utf-8"))
    if manifest.get("engine") != SPARK_DAY:
        return
    try:
        found = lake_day_files(spark, task.lake_root, experiment=experiment, ds=day).fingerprint()
    except InputError as exc:
        raise AirflowFailException(str(exc)) from None
    change = changed_files(manifest["files"], found)
    if change is not None:
        raise AirflowFailException(f"{task.lake_root} ds={day}: {change}; the partition changed after it was "
                                   "checked: run the day again from the 'load' step")


def _estimate_on_spark(task: "SparkEstimateArmsOperator", run_id: str, spark=None) -> dict:
    """The provider's callable: ``spark`` is the session it built, ``task`` and ``run_id`` come from the context."""
    _unchanged_day(task, spark)
    return task.estimate(run_id=str(run_id), spark=spark, lake_root=task.lake_root)


def _load_on_spark(task: "SparkLoadPartitionOperator", spark=None) -> dict:
    """The provider's callable of the Spark load step."""
    from .partition import MissingPartitionError
    from .spark_checks import record_spark_day

    try:
        out = record_spark_day(spark, task.lake(), lake_root=task.lake_root, experiment=task.experiment(),
                               ds=task.day(), staging_root=task.staging_root, clicks_root=task.clicks_root or None,
                               click_window_days=task.click_window_days, max_bids_per_shard=task.max_bids_per_shard)
    except MissingPartitionError:
        raise  # late data: retried
    except InputError as exc:  # the same files fail the same way: no retry
        raise AirflowFailException(str(exc)) from None
    log.info("recorded %s bids of %s on %s in %s file(s), %s shard(s) of at most %s bids, in %s (no bid copied)",
             out["day_bids"], task.experiment_id, task.ds, out["files"], out["shards"], out["max_bids_per_shard"],
             out["folder"])
    if out["measured_arms"]:
        log.info("measured position weights of %s staged", ", ".join(out["measured_arms"]))
    return out


def _validate_on_spark(task: "SparkValidatePartitionOperator", run_id: str, ti=None, spark=None) -> dict:
    """The provider's callable of the Spark validate step."""
    from .spark_checks import run_spark_partition_checks

    experiment, day = task.experiment(), task.day()
    staged = StagedPartition.at(task.staging_root, experiment.id, day)
    try:
        results = run_spark_partition_checks(spark, task.hook(), lake_root=task.lake_root, experiment=experiment,
                                             staged=staged, ds=day)
    except InputError as exc:
        raise AirflowFailException(str(exc)) from None
    return task.recorded(results, staged=staged, run_id=str(run_id), ti=ti)


class _OnSpark(PySparkOperator):
    """A step run by the provider's ``PySparkOperator`` on the session of ``conn_id``."""

    def execute(self, context) -> dict:
        # the provider's session starts Python workers with $PYSPARK_PYTHON (else `python3` on PATH)
        os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
        return PySparkOperator.execute(self, context)


class SparkLoadPartitionOperator(LoadPartitionOperator, _OnSpark):
    """Record one experiment's day of the bid lake on Spark: its files' fingerprint, column types, bids and shards.

    The arguments of :class:`~counterbid.operators.pipeline.LoadPartitionOperator` (``lake_root`` as
    Spark reads it), and ``conn_id`` and ``config_kwargs`` as :class:`SparkEstimateArmsOperator`'s.
    No bid is copied to the worker: the staging folder receives the day's manifest (and measured
    position weights). A missing partition is late data: the step fails and is retried.
    """

    template_fields: Sequence[str] = tuple(dict.fromkeys(
        (*LoadPartitionOperator.template_fields, *PySparkOperator.template_fields)))

    def __init__(self, *, conn_id: str | None = None, config_kwargs: dict | None = None, **kwargs: Any) -> None:
        super().__init__(python_callable=_load_on_spark, conn_id=conn_id or None, config_kwargs=config_kwargs,
                         **kwargs)

    execute = _OnSpark.execute


class SparkValidatePartitionOperator(ValidatePartitionOperator, _OnSpark):
    """Run the checks of one (experiment, day) on Spark; record and fail as the local validate step does.

    The arguments of :class:`~counterbid.operators.pipeline.ValidatePartitionOperator`, and:

    Parameters
    ----------
    lake_root : str
        Root of the bid lake as Spark reads it. Templated.
    conn_id, config_kwargs
        As :class:`SparkEstimateArmsOperator`'s.

    Notes
    -----
    Same check names, rows of ``data_checks``, alert payload and failure message as the local
    route; the offending auctions a contract check lists are the first Spark finds.
    """

    template_fields: Sequence[str] = tuple(dict.fromkeys(
        (*ValidatePartitionOperator.template_fields, "lake_root", *PySparkOperator.template_fields)))

    def __init__(self, *, lake_root: str | Path, conn_id: str | None = None, config_kwargs: dict | None = None,
                 **kwargs: Any) -> None:
        super().__init__(python_callable=_validate_on_spark, conn_id=conn_id or None, config_kwargs=config_kwargs,
                         **kwargs)
        self.lake_root = str(lake_root)

    execute = _OnSpark.execute


class SparkEstimateArmsOperator(EstimateArmsOperator, PySparkOperator):
    """Estimate every arm of one (experiment, day) on Spark; combine the day and the experiment to date.

    The arguments of :class:`~counterbid.operators.pipeline.EstimateArmsOperator`, and:

    Parameters
    ----------
    lake_root : str
        Root of the Hive-partitioned bid lake (``<root>/ds=YYYY-MM-DD/*.parquet``) as Spark reads
        it (a path every Spark executor sees, or an object-store URL such as ``s3a://...``).
        Templated.
    conn_id : str, optional
        Airflow connection of the Spark cluster (the provider's ``spark`` or ``spark_connect``
        type); default: none, a ``local[*]`` session in the task's process. Templated.
    config_kwargs : dict, optional
        Spark settings that override the connection's extras. Templated.

    Notes
    -----
    Spark's Python workers run ``$PYSPARK_PYTHON``, set here to the task's own interpreter when
    unset (right for local sessions and for clusters whose nodes share the worker image); they
    need counterbid installed. Numbers, stored rows and error lines are the local engine's: the
    shards are the load step's, and messages name the staged day and its shards. Spark must read
    the bids the load step staged: when the partition changed in between, the step fails and
    asks for the day to run again from the load step.
    """

    template_fields: Sequence[str] = tuple(dict.fromkeys(
        (*EstimateArmsOperator.template_fields, "lake_root", *PySparkOperator.template_fields)))

    def __init__(self, *, lake_root: str | Path, conn_id: str | None = None, config_kwargs: dict | None = None,
                 **kwargs: Any) -> None:
        super().__init__(python_callable=_estimate_on_spark, conn_id=conn_id or None, config_kwargs=config_kwargs,
                         **kwargs)
        self.lake_root = str(lake_root)

    def execute(self, context) -> dict:
        # the provider's session starts Python workers with $PYSPARK_PYTHON (else `python3` on PATH)
        os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
        return PySparkOperator.execute(self, context)
