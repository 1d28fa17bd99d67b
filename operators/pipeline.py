"""Airflow 3 operators of the daily pipeline: load, validate, estimate, write.

Each operator builds a :class:`~counterbid.operators.hooks.ResultsHook`, calls one function of
:mod:`counterbid.operators.partition` for one (experiment, day), logs, and raises. Configuration
is checked in ``__init__`` (a broken DAG fails when it is parsed); dates and paths are templated.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from airflow.sdk import Asset, BaseOperator
from airflow.sdk.exceptions import AirflowFailException

from counterbid.estimators import CheckResult, load_experiment
from counterbid.estimators.arms import CLUSTERS
from counterbid.estimators.errors import InputError
from counterbid.sql import validate_identifier

from . import notify, partition
from .hooks import DEFAULT_CONN_ID, ResultsHook

__all__ = [
    "EstimateArmsOperator",
    "LoadPartitionOperator",
    "RESULTS_ASSET",
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


def _templated(value: object) -> bool:
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
        return ResultsHook(database=self.results_database or None, counterbid_conn_id=self.results_conn_id,
                           schema=self.results_schema)

    def day(self):
        return partition.parse_day(self.ds)

    def experiment(self):
        return load_experiment(self.spec_path, self.experiment_id)


class LoadPartitionOperator(_PartitionOperator):
    """Stage one experiment's bids of one day (and experiment-to-date) from the bid lake.

    Parameters
    ----------
    lake_root : str
        Root of the Hive-partitioned bid lake (``<root>/ds=YYYY-MM-DD/*.parquet``), a local path
        or an object-store URL. Read with partition pruning. Templated.
    """

    template_fields: Sequence[str] = (*_PartitionOperator.template_fields, "lake_root")

    def __init__(self, *, lake_root: str | Path, **kwargs: Any) -> None:
        super().__init__(**kwargs)
        self.lake_root = str(lake_root)

    def execute(self, context) -> dict:
        try:
            out = partition.stage_partition(self.hook(), lake_root=self.lake_root, experiment=self.experiment(),
                                            ds=self.day(), staging_root=self.staging_root)
        except InputError as exc:  # the same files fail the same way: no retry
            raise AirflowFailException(str(exc)) from None
        log.info("staged %s bids of %s on %s (%s experiment-to-date from %s) in %s", out["day_bids"],
                 self.experiment_id, self.ds, out["to_date_bids"], out["first_ds"], out["folder"])
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
        staged = partition.StagedPartition.at(self.staging_root, experiment.id, day)
        results = partition.run_partition_checks(self.hook(), experiment=experiment, staged=staged, ds=day)
        status = partition.record_checks(staged, results)
        partition.store_checks(self.hook(), results, experiment_id=experiment.id, ds=day, run_id=str(context["run_id"]))
        for r in results:
            (log.info if r.passed else log.warning)("%s", r.describe())
        # The alert notifier (task-level callback) reads the outcomes from here.
        context["ti"].xcom_push(key=notify.XCOM_KEY, value=notify.check_payload(results, experiment_id=experiment.id, ds=day))
        message = failed_checks_message(results, where=f"experiment {experiment.id!r} on {day}")
        if message:
            raise AirflowFailException(message)  # the same data fails the same way: no retry
        return {"status": status, "failed": [r.check for r in results if not r.passed]}


class EstimateArmsOperator(_PartitionOperator):
    """Estimate every arm of one (experiment, day) with ``estimate_arms`` (day and to-date).

    Parameters
    ----------
    clicks_root : str, optional
        Root of the click log, needed when an arm's position weights are ``measured``. Templated.
    click_window_days : int
        Trailing days of clicks pooled for measured weights (default 7).
    confidence_level : float
    cluster : {'auto', 'auction', 'bidder'}
        Unit of the standard errors (default ``'auto'``: bidder when bidder ids repeat across
        auctions; see ``estimate_arms``).
    """

    template_fields: Sequence[str] = (*_PartitionOperator.template_fields, "clicks_root")

    def __init__(
        self,
        *,
        clicks_root: str | None = None,
        click_window_days: int = 7,
        confidence_level: float = 0.95,
        cluster: str = "auto",
        **kwargs: Any,
    ) -> None:
        super().__init__(**kwargs)
        if isinstance(click_window_days, bool) or not isinstance(click_window_days, int) or click_window_days < 1:
            raise InputError(f"{self.task_id}: `click_window_days` must be an integer >= 1; got {click_window_days!r}")
        if not (isinstance(confidence_level, float) and 0 < confidence_level < 1):
            raise InputError(f"{self.task_id}: `confidence_level` must be in (0, 1); got {confidence_level!r}")
        if cluster not in CLUSTERS:
            raise InputError(f"{self.task_id}: `cluster` must be one of {', '.join(CLUSTERS)}; got {cluster!r}")
        self.clicks_root = clicks_root
        self.click_window_days = click_window_days
        self.confidence_level = confidence_level
        self.cluster = cluster

    def execute(self, context) -> dict:
        out = partition.estimate_partition(
            self.hook(), experiment=self.experiment(), ds=self.day(), staging_root=self.staging_root,
            run_id=str(context["run_id"]), clicks_root=self.clicks_root or None,
            click_window_days=self.click_window_days, confidence_level=self.confidence_level, cluster=self.cluster)
        log.info("estimated %s on %s (status %s): day revenue per auction %s", self.experiment_id, self.ds,
                 out["status"], out["day_revenue_per_auction"])
        return out


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
        counts = partition.write_partition(self.hook(), experiment_id=self.experiment_id, ds=self.day(),
                                           staging_root=self.staging_root, cleanup=self.cleanup)
        log.info("wrote %s for %s on %s", counts, self.experiment_id, self.ds)
        return counts
