"""The estimate step on a Spark cluster, through the Apache Spark provider of Airflow.

:class:`SparkEstimateArmsOperator` is :class:`~counterbid.operators.pipeline.EstimateArmsOperator`
run by the provider's ``PySparkOperator``: the provider builds the Spark session from an Airflow
connection (host = master URL such as ``spark://host:7077``, ``yarn`` or ``local[4]``; a
``spark_connect`` connection or an ``sc://`` host = Spark Connect; the connection's extras = Spark
settings), hands it to the step and stops it when the step ends. Spark reads the day's partition
of the lake itself, splits it into the shards the load step staged (the same md5 hash of the
auction id) and estimates the shards in parallel; the driver combines the pieces, and everything
after (the experiment to date, the staged files the write step stores) is the local engine's code.

Needs the ``spark`` extra (``pip install 'counterbid[spark]'``): this module imports the provider.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from airflow.providers.apache.spark.operators.spark_pyspark import PySparkOperator

from .pipeline import EstimateArmsOperator

__all__ = ["SparkEstimateArmsOperator"]


def _estimate_on_spark(task: "SparkEstimateArmsOperator", run_id: str, spark=None) -> dict:
    """The provider's callable: ``spark`` is the session it built, ``task`` and ``run_id`` come from the context."""
    return task.estimate(run_id=str(run_id), spark=spark, lake_root=task.lake_root)


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
