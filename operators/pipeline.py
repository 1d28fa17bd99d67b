"""Airflow 3 operators of the daily pipeline: load, validate, estimate, write.

Each operator builds the hooks it needs (:class:`~counterbid.operators.hooks.ResultsHook`: the
results sink; :class:`~counterbid.operators.lake_hook.LakeHook`: the lake and the staged files),
calls one function of :mod:`counterbid.operators.partition` for one (experiment, day), logs, and
raises. Configuration is checked in ``__init__`` (a broken DAG fails when it is parsed); dates and
paths are templated.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from airflow.sdk import Asset, BaseOperator
from airflow.sdk.exceptions import AirflowFailException

from counterbid.estimators.constants import CLUSTERS
from counterbid.estimators.days import parse_day
from counterbid.estimators.errors import InputError
from counterbid.sql import validate_identifier

from . import notify

if TYPE_CHECKING:
    from counterbid.estimators.checks import CheckResult

    from .hooks import ResultsHook
    from .lake_hook import LakeHook

__all__ = [
    "DEFAULT_CLUSTER",
    "DEFAULT_CONFIDENCE_LEVEL",
    "EstimateArmsOperator",
    "EstimateShardOperator",
    "LoadPartitionOperator",
    "RESULTS_ASSET",
    "ShardTaskError",
    "ValidatePartitionOperator",
    "WRITER_POOL",
    "WriteEstimatesOperator",
    "failed_checks_message",
]

log = logging.getLogger(__name__)

#: Asset updated by every successful write; downstream DAGs can schedule on it.
RESULTS_ASSET = Asset(name="counterbid_arm_estimates", uri="counterbid://results/arm_estimates")
#: Airflow pool (one slot) that serializes writers of the results database file.
WRITER_POOL = "counterbid_results_writer"
#: Confidence level of the pipeline's intervals unless the run says otherwise.
DEFAULT_CONFIDENCE_LEVEL = 0.95
#: Clustering of the pipeline's standard errors unless the run says otherwise: ``'auto'`` (by
#: bidder when bidder ids repeat across auctions, else by auction) where the estimator offers it.
#: Older estimators reject ``'auto'``, so the default falls back to ``'auction'`` there rather
#: than break every run; the stored rows say which clustering was used either way.
DEFAULT_CLUSTER = "auto" if "auto" in CLUSTERS else "auction"


def _partition():
    """The steps themselves (:mod:`counterbid.operators.partition`: the estimator, scipy, the checks),
    imported when a task runs: Airflow parses the DAG file, which builds these operators, far more
    often than a task runs."""
    from . import partition

    return partition


def _estimate_step():
    """The estimate step and its shard tasks (:mod:`counterbid.operators.estimate_step`), imported when
    a task runs: without the data checks (and ``scipy.stats``) that :mod:`.partition` loads for validate."""
    from . import estimate_step

    return estimate_step


#: Connection id of the results sink unless an operator names another: the value of
#: :data:`counterbid.operators.hooks.DEFAULT_CONN_ID`, spelled here so that building the operators
#: (every parse of the DAG file, and every task process before its task) leaves the hooks, DuckDB,
#: pandas and pyarrow unloaded; tests/operators/test_operators.py checks that the two agree.
DEFAULT_CONN_ID = "counterbid_results"


def _templated(value: object) -> bool:
    """A value Airflow will render (a Jinja template), checked only when the task runs."""
    return isinstance(value, str) and "{{" in value


class _PartitionOperator(BaseOperator):
    """Shared arguments of the per-(experiment, day) operators."""

    template_fields: Sequence[str] = ("experiment_id", "ds", "spec_path", "staging_root", "results_database")

    def __init__(
        self,
        *,
        experiment_id: str,
        spec_path: str | Path,
        staging_root: str | Path,
        ds: str = "{{ ds }}",
        results_database: str | None = None,
        results_conn_id: str = DEFAULT_CONN_ID,
        results_schema: str = "main",
        **kwargs: Any,
    ) -> None:
        super().__init__(**kwargs)
        self.experiment_id = experiment_id
        self.ds = ds
        self.spec_path = str(spec_path)
        self.staging_root = str(staging_root)
        self.results_database = None if results_database is None else str(results_database)
        self.results_conn_id = results_conn_id
        self.results_schema = validate_identifier(results_schema, what="results_schema")
        if not self.staging_root:
            raise InputError(f"{self.task_id}: `staging_root` must be a folder path")

    def hook(self) -> ResultsHook:
        """The results sink (a DuckDB file or PostgreSQL)."""
        from .hooks import ResultsHook

        return ResultsHook(database=self.results_database or None, counterbid_conn_id=self.results_conn_id,
                           schema=self.results_schema)

    def lake(self) -> LakeHook:
        """In-memory DuckDB reads of the lake, the click log and the staged files."""
        from .lake_hook import LakeHook

        return LakeHook()

    def day(self):
        return parse_day(self.ds)

    def experiment(self):
        from counterbid.estimators.spec import load_experiment

        return load_experiment(self.spec_path, self.experiment_id)


class LoadPartitionOperator(_PartitionOperator):
    """Stage one experiment's bids of one day from the bid lake, split into shards.

    Arms whose position weights are ``measured`` get them here, from the click log, once per
    (experiment, day); the validate and estimate steps read them from staging.

    Parameters
    ----------
    lake_root : str
        Root of the Hive-partitioned bid lake (``<root>/ds=YYYY-MM-DD/*.parquet``), a local path
        or an object-store URL. Read with partition pruning. Templated.
    clicks_root : str, optional
        Root of the click log, needed when an arm's position weights are ``measured``. Templated.
    click_window_days : int
        Trailing days of clicks pooled for measured weights (default 7).
    max_bids_per_shard : int or str, optional
        A day with more bids is split into ``ceil(bids / max)`` shards by the stable hash of the
        auction id (default: ``$COUNTERBID_MAX_BIDS_PER_SHARD``, else
        :data:`~counterbid.estimators.MAX_BIDS_PER_SHARD`). Templated; an empty rendered
        value means the default.
    """

    template_fields: Sequence[str] = (*_PartitionOperator.template_fields, "lake_root", "clicks_root",
                                      "max_bids_per_shard")

    def __init__(
        self, *, lake_root: str | Path, clicks_root: str | None = None, click_window_days: int = 7,
        max_bids_per_shard: int | str | None = None, **kwargs: Any
    ) -> None:
        super().__init__(**kwargs)
        if not _templated(max_bids_per_shard):
            from counterbid.readers.shards import max_bids_per_shard as max_bids_setting

            max_bids_setting(max_bids_per_shard, what=f"{self.task_id}: `max_bids_per_shard`")
        self.max_bids_per_shard = max_bids_per_shard
        if isinstance(click_window_days, bool) or not isinstance(click_window_days, int) or click_window_days < 1:
            raise InputError(f"{self.task_id}: `click_window_days` must be an integer >= 1; got {click_window_days!r}")
        self.lake_root = str(lake_root)
        self.clicks_root = clicks_root
        self.click_window_days = click_window_days

    def execute(self, context) -> dict:
        from .load_step import stage_partition  # not partition: the load task leaves the estimator and checks unloaded

        try:
            out = stage_partition(self.lake(), lake_root=self.lake_root, experiment=self.experiment(),
                                  ds=self.day(), staging_root=self.staging_root,
                                  clicks_root=self.clicks_root or None, click_window_days=self.click_window_days,
                                  max_bids_per_shard=self.max_bids_per_shard)
        except InputError as exc:  # the same files fail the same way: no retry
            raise AirflowFailException(str(exc)) from None
        log.info("staged %s bids of %s on %s in %s shard(s) of at most %s bids in %s", out["day_bids"],
                 self.experiment_id, self.ds, out["shards"], out["max_bids_per_shard"], out["folder"])
        if out["measured_arms"]:
            log.info("measured position weights of %s staged", ", ".join(out["measured_arms"]))
        return out


def failed_checks_message(results: Sequence[CheckResult], *, where: str) -> str | None:
    """One message listing every failed ``error`` check, or ``None`` when none failed."""
    failed = [r for r in results if not r.passed and r.severity == "error"]
    if not failed:
        return None
    lines = [f"{len(failed)} check(s) failed for {where}:"]
    lines += [f"  - {r.describe()} {dict(r.details)}" for r in failed]
    return "\n".join(lines)


class ValidatePartitionOperator(_PartitionOperator):
    """Run the checks of one staged (experiment, day); fail listing every failing check.

    The outcomes are recorded beside the staged bids before anything is raised; a failed
    ``warning`` check lets the partition through with status ``warning``.
    """

    def execute(self, context) -> dict:
        experiment, day = self.experiment(), self.day()
        from .staging import StagedPartition

        staged = StagedPartition.at(self.staging_root, experiment.id, day)
        results = _partition().run_partition_checks(self.hook(), self.lake(), experiment=experiment, staged=staged, ds=day)
        return self.recorded(results, staged=staged, run_id=str(context["run_id"]), ti=context["ti"])

    def recorded(self, results: Sequence[CheckResult], *, staged: StagedPartition, run_id: str, ti) -> dict:
        """Record the outcomes (beside the staged day, the ``data_checks`` table, XCom for the alert) and fail
        listing every failed ``error`` check: the same rows and alert text whichever engine ran the checks."""
        experiment, day = self.experiment(), self.day()
        status = _partition().record_checks(staged, results)
        _partition().store_checks(self.hook(), results, experiment_id=experiment.id, ds=day, run_id=run_id)
        for r in results:
            (log.info if r.passed else log.warning)("%s", r.describe())
        # The alert notifier (task-level callback) reads the outcomes from here.
        ti.xcom_push(key=notify.XCOM_KEY, value=notify.check_payload(results, experiment_id=experiment.id, ds=day))
        message = failed_checks_message(results, where=f"experiment {experiment.id!r} on {day}")
        if message:
            raise AirflowFailException(message)  # the same data fails the same way: no retry
        return {"status": status, "failed": [r.check for r in results if not r.passed]}


class EstimateArmsOperator(_PartitionOperator):
    """Estimate every arm of one (experiment, day) shard by shard; combine the day and the experiment to date.

    Measured position weights are the ones the load step staged; the experiment-to-date rows
    combine the stored pieces of the earlier days in the analysis window with the day's.

    Parameters
    ----------
    confidence_level : float or str
        Level of the intervals, in (0, 1). Templated (e.g. ``"{{ params.confidence_level }}"``);
        a rendered string is read as a number when the task runs.
    cluster : str
        One of ``counterbid.estimators.CLUSTERS``; default :data:`DEFAULT_CLUSTER`. Templated.
    shard_tasks : bool
        The day's shards were estimated by :class:`EstimateShardOperator` tasks (one mapped task
        per shard): combine the pieces they stored instead of estimating the shards here (the
        same rows; a shard whose pieces are missing fails the task, naming it). A day staged as
        one shard has no shard task and is estimated here.
    """

    template_fields: Sequence[str] = (*_PartitionOperator.template_fields, "confidence_level", "cluster")

    def __init__(
        self,
        *,
        confidence_level: float | str = DEFAULT_CONFIDENCE_LEVEL,
        cluster: str = DEFAULT_CLUSTER,
        shard_tasks: bool = False,
        **kwargs: Any,
    ) -> None:
        super().__init__(**kwargs)
        self.shard_tasks = bool(shard_tasks)
        # Templated values are checked when rendered (execute); literal ones fail the DAG's parse.
        if not _templated(confidence_level):
            _level(confidence_level, self.task_id)
        if not _templated(cluster):
            _cluster(cluster, self.task_id)
        self.confidence_level = confidence_level
        self.cluster = cluster

    def execute(self, context) -> dict:
        return self.estimate(run_id=str(context["run_id"]))

    def estimate(self, *, run_id: str, spark=None, lake_root: str | None = None) -> dict:
        """Run :func:`counterbid.operators.partition.estimate_partition` (on Spark when ``spark`` is given) and log it.

        Bad parameters or input (:class:`InputError`) fail the task without retry: the same
        files fail the same way.
        """
        try:
            level, cluster = _level(self.confidence_level, self.task_id), _cluster(self.cluster, self.task_id)
            out = _estimate_step().estimate_partition(
                self.hook(), experiment=self.experiment(), ds=self.day(), staging_root=self.staging_root,
                run_id=run_id, confidence_level=level, cluster=cluster, spark=spark, lake_root=lake_root,
                shard_tasks=self.shard_tasks and spark is None)
        except InputError as exc:
            raise AirflowFailException(str(exc)) from None
        log.info("estimated %s on %s (status %s, %s shard(s), %s engine): day revenue per auction %s; to date over %s "
                 "(left out: %s)", self.experiment_id, self.ds, out["status"], out["shards"], out["engine"],
                 out["day_revenue_per_auction"], out["days_used"] or "no day", out["days_left_out"] or "none")
        return out


class ShardTaskError(RuntimeError):
    """A shard task failed for a reason other than its bids (memory, storage): retried; names the shard."""


class EstimateShardOperator(_PartitionOperator):
    """Estimate one staged shard of one (experiment, day) and store its pieces (one mapped task per shard).

    Mapped over the staged shards (``.partial(...).expand_kwargs([{"experiment_id": ..., "shard":
    k}, ...])``), so an executor that runs tasks on several workers spreads a large day over them;
    :class:`EstimateArmsOperator` with ``shard_tasks=True`` then combines the stored pieces. A
    retry or rerun replaces the shard's pieces. Bad bids fail without retry; any other failure is
    retried; both name the shard.

    Parameters
    ----------
    shard : int or str
        One of the shards the load step staged. Templated.
    cluster : str
        As :class:`EstimateArmsOperator`'s (the estimate step refuses pieces of another). Templated.
    """

    template_fields: Sequence[str] = (*_PartitionOperator.template_fields, "shard", "cluster")

    def __init__(self, *, shard: int | str, cluster: str = DEFAULT_CLUSTER, **kwargs: Any) -> None:
        kwargs.setdefault("map_index_template", "{{ task.experiment_id }} shard {{ task.shard }}")
        super().__init__(**kwargs)
        if not _templated(cluster):
            _cluster(cluster, self.task_id)
        self.shard = shard
        self.cluster = cluster

    def execute(self, context) -> dict:
        where = f"shard {self.shard} of experiment {self.experiment_id!r} on {self.ds}"
        try:
            k = int(self.shard)
        except (TypeError, ValueError):
            raise AirflowFailException(f"{self.task_id}: `shard` must be a whole number; got {self.shard!r}") from None
        try:
            out = _estimate_step().estimate_partition_shard(self.experiment(), ds=self.day(), staging_root=self.staging_root,
                                                     shard=k, cluster=_cluster(self.cluster, self.task_id))
        except InputError as exc:  # the same files fail the same way: no retry
            raise AirflowFailException(str(exc)) from None
        except Exception as exc:
            raise ShardTaskError(f"{where}: {type(exc).__name__}: {exc}") from exc
        log.info("estimated %s: %s piece(s), %s bids (%s single-bidder auctions left out) in %s", where,
                 out["pieces"], out["bids"], out["excluded_auctions"], out["folder"])
        return out


def _level(value: object, task_id: str) -> float:
    """A confidence level from a number or a rendered template string; must lie in (0, 1)."""
    try:
        level = float(value) if isinstance(value, (int, float, str)) and not isinstance(value, bool) else None
    except ValueError:
        level = None
    if level is None or not 0 < level < 1:
        raise InputError(f"{task_id}: `confidence_level` must be a number in (0, 1); got {value!r}")
    return level


def _cluster(value: object, task_id: str) -> str:
    if value not in CLUSTERS:
        raise InputError(f"{task_id}: `cluster` must be one of {', '.join(CLUSTERS)}; got {value!r}")
    return str(value)


class WriteEstimatesOperator(_PartitionOperator):
    """Replace one (experiment, day)'s rows of the results tables in one transaction.

    Declares :data:`RESULTS_ASSET` as outlet and runs in the one-slot :data:`WRITER_POOL` unless
    told otherwise; the hook also retries on DuckDB's file-lock error.
    """

    def __init__(self, *, cleanup: bool = True, **kwargs: Any) -> None:
        kwargs.setdefault("outlets", [RESULTS_ASSET])
        kwargs.setdefault("pool", WRITER_POOL)
        super().__init__(**kwargs)
        self.cleanup = bool(cleanup)

    def execute(self, context) -> dict:
        from .write_step import write_partition  # not partition: the write task leaves the checks and scipy.stats unloaded

        counts = write_partition(self.hook(), experiment_id=self.experiment_id, ds=self.day(),
                                 staging_root=self.staging_root, cleanup=self.cleanup)
        log.info("wrote %s for %s on %s", counts, self.experiment_id, self.ds)
        return counts
