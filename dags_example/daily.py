"""Daily per-arm estimates of the auction-rule experiments in a spec file.

For each day: list the experiments active that day, then for each of them (dynamic task
mapping) load the day's bids from the lake, validate them, estimate every arm, and write the
results database. Catchup is on, so a new deployment or ``airflow backfill create`` fills past
days; every write replaces its (experiment, day), so reruns never duplicate rows.

Configuration (environment, read when the DAG is parsed; each is also a run parameter):
``COUNTERBID_LAKE`` bid lake root, ``COUNTERBID_SPEC`` experiment spec, ``COUNTERBID_RESULTS``
results DuckDB file or ``postgresql://`` URL (empty: the ``counterbid_results`` connection, of type
``counterbid_duckdb`` or ``postgres``), ``COUNTERBID_STAGING``
staging folder, ``COUNTERBID_CLICKS`` click log root (for measured position weights),
``COUNTERBID_LEVEL`` confidence level of the intervals (default 0.95), ``COUNTERBID_CLUSTER``
clustering of the standard errors (``auction``, ``bidder`` or, where the estimator offers it,
``auto``; the default), ``COUNTERBID_START`` first day, ``COUNTERBID_RETRIES`` task retries (a
missing partition is late data: the load step fails and is retried), ``COUNTERBID_RETRY_DELAY``
seconds between tries (default 300),
``COUNTERBID_CATCHUP`` (``false`` leaves past days to ``airflow backfill create``),
``COUNTERBID_MAX_BIDS_PER_SHARD`` (a day with more bids is estimated in ``ceil(bids / max)``
shards; default 4M), ``COUNTERBID_MAX_ACTIVE_RUNS`` (default 1: each day's experiment-to-date rows
combine the stored pieces of the days before it, so days are written in order; a backfill is bounded
by its own ``airflow backfill create --max-active-runs``, not by this: pass 1 there too). The level and
clustering each stored row used are written beside it.

Engine of the estimate step (read when the DAG is parsed only): ``COUNTERBID_ENGINE`` ``local``
(the default: a day staged in several shards gets one mapped task per shard, ``estimate_shard``,
which estimates it and stages its pieces; the ``experiment.estimate`` step combines them, so an
executor with several workers spreads a large day over them; a day of one shard is estimated by the
``experiment.estimate`` step itself) or ``spark`` (the
``spark`` extra: ``SparkEstimateArmsOperator``, through the Apache Spark provider; Spark reads
the day's partition of ``lake_root`` itself, splits it into the shards the load step staged and
estimates them in parallel; the numbers and stored rows are the local engine's). With ``spark``,
``COUNTERBID_SPARK_CONN`` names the Airflow connection of the cluster (host = master URL, extras =
Spark settings; a ``spark_connect`` connection for Spark Connect); empty = a ``local[*]`` session
in the worker. With ``spark`` the load and validate steps run on the same session too, and no
step copies the day onto the worker: load records the day's files (paths, sizes, rows), column
types, bids and shards (``SparkLoadPartitionOperator``); validate runs the schema gate and
counting checks in Spark SQL, the contract suite through Great Expectations' Spark data source,
and the distribution checks on a bounded hash sample of whole auctions, the only bids that reach
the worker (``SparkValidatePartitionOperator``); estimate refuses a day whose files changed
after load. With ``local`` they stage and check the day with DuckDB. Spark's executors read the
lake at ``COUNTERBID_SPARK_LAKE`` (the run parameter ``spark_lake_root``), by default
``lake_root`` itself -- set it when Spark names the same store differently (``s3a://`` for
DuckDB's ``s3://``).
"""

from __future__ import annotations

import datetime as dt
import os
from pathlib import Path

from airflow.sdk import dag, task, task_group

# Airflow re-parses this file often (the DAG processor, and every task before it runs): it imports
# the operators and settings only. The steps, the estimator (scipy) and Great Expectations load in the
# task that runs them (tests/dags/test_daily_dag.py checks what a parse loads).
from counterbid.operators.extras import require_extras_for
from counterbid.operators.notify import CheckAlertNotifier
from counterbid.operators.pipeline import (
    DEFAULT_CLUSTER,
    DEFAULT_CONFIDENCE_LEVEL,
    EstimateArmsOperator,
    EstimateShardOperator,
    LoadPartitionOperator,
    ValidatePartitionOperator,
    WriteEstimatesOperator,
)
from counterbid.operators.results_target import results_target

DAG_ID = "counterbid_daily"
HERE = Path(__file__).resolve().parent
ENGINE = os.environ.get("COUNTERBID_ENGINE", "local").strip().lower() or "local"
SPARK_CONN = os.environ.get("COUNTERBID_SPARK_CONN", "").strip() or None
if ENGINE not in ("local", "spark"):
    raise ValueError(f"COUNTERBID_ENGINE must be 'local' or 'spark'; got {ENGINE!r}")
# A setting that needs an optional extra stops here, at parse time, in one line naming the extra.
require_extras_for(results=results_target(os.environ["COUNTERBID_RESULTS"], what="COUNTERBID_RESULTS")
                   if os.environ.get("COUNTERBID_RESULTS", "").strip() else None,
                   engine=ENGINE, results_setting="COUNTERBID_RESULTS", engine_setting="COUNTERBID_ENGINE")
START = dt.datetime.fromisoformat(os.environ.get("COUNTERBID_START", "2026-03-02")).replace(tzinfo=dt.timezone.utc)

# Alerts: failed data checks (observed vs threshold) or the task's error, to the task log by
# default. For a webhook, Slack or mail, set COUNTERBID_ALERT_TARGET=webhook|slack|smtp and
# COUNTERBID_ALERT_CONN to an Airflow connection (the `alerts` extra's HTTP, Slack or SMTP
# provider sends it); COUNTERBID_ALERT_ENDPOINT is the webhook's path after the connection's URL.
# Task-level callbacks (default_args), so they also run under dag.test().
ALERTS = CheckAlertNotifier(
    target=os.environ.get("COUNTERBID_ALERT_TARGET", "log"),
    conn_id=os.environ.get("COUNTERBID_ALERT_CONN") or None,
    endpoint=os.environ.get("COUNTERBID_ALERT_ENDPOINT") or None,
)


@dag(
    dag_id=DAG_ID,
    schedule="@daily",
    start_date=START,
    catchup=os.environ.get("COUNTERBID_CATCHUP", "true").lower() in ("1", "true", "yes"),
    # Each day's to-date rows combine the days already written: one day at a time by default.
    max_active_runs=int(os.environ.get("COUNTERBID_MAX_ACTIVE_RUNS", "1")),
    default_args={
        "retries": int(os.environ.get("COUNTERBID_RETRIES", "2")),
        "retry_delay": dt.timedelta(seconds=float(os.environ.get("COUNTERBID_RETRY_DELAY", "300"))),
        "on_failure_callback": ALERTS,
    },
    params={
        "lake_root": os.environ.get("COUNTERBID_LAKE", "/srv/quillfen/lake/bids"),
        "spec_path": os.environ.get("COUNTERBID_SPEC", str(HERE / "experiments.yaml")),
        "results_database": os.environ.get("COUNTERBID_RESULTS", ""),
        "staging_root": os.environ.get("COUNTERBID_STAGING", "/tmp/counterbid-staging"),
        "clicks_root": os.environ.get("COUNTERBID_CLICKS", ""),
        "confidence_level": os.environ.get("COUNTERBID_LEVEL", str(DEFAULT_CONFIDENCE_LEVEL)),
        "cluster": os.environ.get("COUNTERBID_CLUSTER", DEFAULT_CLUSTER),
        "max_bids_per_shard": os.environ.get("COUNTERBID_MAX_BIDS_PER_SHARD", ""),
        # the lake as Spark's executors read it, when their URL differs from DuckDB's (s3a:// vs s3://)
        "spark_lake_root": os.environ.get("COUNTERBID_SPARK_LAKE", ""),
    },
    tags=["counterbid"],
    doc_md=__doc__,
)
def counterbid_daily():
    @task
    def active_experiments(params=None, ds=None) -> list[str]:
        from counterbid.estimators.spec import load_experiments, parse_day  # the spec alone, not the steps

        return [e.id for e in load_experiments(params["spec_path"]).values() if e.is_active(parse_day(ds))]

    steps = {}  # the group's validate and estimate, wired to the shard tasks below

    @task_group(group_id="experiment")
    def one_experiment(experiment_id):
        paths = {
            "experiment_id": experiment_id,
            "spec_path": "{{ params.spec_path }}",
            "staging_root": "{{ params.staging_root }}",
            "results_database": "{{ params.results_database }}",
        }
        # measured position weights come from the click log in the load step, once per (experiment, day);
        # in validate, warnings pass with the status flag 'warning' and still alert; errors fail the task (and alert)
        shard_setting = "{{ params.max_bids_per_shard }}"
        options = {"confidence_level": "{{ params.confidence_level }}", "cluster": "{{ params.cluster }}", **paths}
        if ENGINE == "spark":  # Spark reads the day from the lake in every step; nothing of it is staged on the worker
            from counterbid.operators.spark_pipeline import (SparkEstimateArmsOperator, SparkLoadPartitionOperator,
                                                             SparkValidatePartitionOperator)

            spark_lake = "{{ params.spark_lake_root or params.lake_root }}"
            load = SparkLoadPartitionOperator(task_id="load", lake_root=spark_lake, clicks_root="{{ params.clicks_root }}",
                                              max_bids_per_shard=shard_setting, conn_id=SPARK_CONN, **paths)
            validate = SparkValidatePartitionOperator(task_id="validate", lake_root=spark_lake, conn_id=SPARK_CONN,
                                                      on_success_callback=ALERTS, **paths)
            estimate = SparkEstimateArmsOperator(task_id="estimate", lake_root=spark_lake, conn_id=SPARK_CONN, **options)
        else:  # the shard tasks below estimated the shards; this step combines their pieces
            load = LoadPartitionOperator(task_id="load", lake_root="{{ params.lake_root }}",
                                         clicks_root="{{ params.clicks_root }}", max_bids_per_shard=shard_setting,
                                         **paths)
            validate = ValidatePartitionOperator(task_id="validate", on_success_callback=ALERTS, **paths)
            # a day of one shard maps no shard task (estimated here): the shard tasks may be skipped, not failed
            estimate = EstimateArmsOperator(task_id="estimate", shard_tasks=True, trigger_rule="none_failed", **options)
        write = WriteEstimatesOperator(task_id="write", **paths)
        load >> validate >> estimate >> write
        steps.update(validate=validate, estimate=estimate, write=write)

    experiments = active_experiments()
    one_experiment.expand(experiment_id=experiments)
    if ENGINE == "local":
        # Airflow cannot map a task inside a mapped group, so the shards of every experiment of the
        # day are one mapped task between the group's validate and estimate steps, listed after every
        # validate step has ended (all_done), for the experiments whose checks passed and that staged
        # several shards (a one-shard day is estimated by its estimate step; when no experiment has
        # several, no shard task is mapped and the estimate steps, trigger rule none_failed, still run).
        # A failed experiment's estimate is upstream_failed through its own validate step and the
        # others go on; a shard task that fails after its retries holds back every experiment's
        # estimate of the day (upstream_failed, so the run fails and alerts once, from the shard task).
        @task(trigger_rule="all_done")
        def day_shards(params=None, ds=None, ti=None) -> list[dict]:
            from counterbid.estimators.days import parse_day
            from counterbid.operators.shard_step import validated_shards

            ids = ti.xcom_pull(task_ids="active_experiments") or []
            passed = [e for i, e in enumerate(ids)
                      if ti.xcom_pull(task_ids="experiment.validate", map_indexes=i) is not None]
            return validated_shards(params["staging_root"], parse_day(ds), passed)

        shards = day_shards()
        steps["validate"] >> shards
        estimate_shard = EstimateShardOperator.partial(
            task_id="estimate_shard", spec_path="{{ params.spec_path }}", staging_root="{{ params.staging_root }}",
            results_database="{{ params.results_database }}", cluster="{{ params.cluster }}",
        ).expand_kwargs(shards)
        estimate_shard >> steps["estimate"]

        # Airflow judges a run by its last tasks. When no experiment passes its checks, no shard task
        # is mapped and no estimate or write runs, which alone could end the run as a success:
        # this last task is upstream_failed whenever a validate step failed (no task runs, no alert).
        @task
        def day_settled() -> None:
            return None

        settled = day_settled()
        steps["validate"] >> settled
        steps["write"] >> settled


counterbid_daily()
