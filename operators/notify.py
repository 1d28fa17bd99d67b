"""Alerts on failed data checks: an Airflow notifier posting one compact message.

The validating task pushes its outcomes to XCom under :data:`XCOM_KEY` as
``{"experiment_id", "ds", "results": [CheckResult fields...]}`` (see :func:`check_payload`); the
notifier, attached as a task's ``on_failure_callback`` (error checks) or ``on_success_callback``
(it stays silent when nothing failed), pulls them and sends the message to the log (default), an
HTTP webhook, a Slack incoming webhook or e-mail, through Airflow's HTTP, Slack and SMTP providers
and their connections (:mod:`counterbid.operators.alert_targets`).

A delivery that fails is logged (target, connection, reason) and raised from the callback; Airflow
logs the callback's failure and leaves the task's own outcome as it was, so a failed alert never
replaces a failed check as the task's failure.

Task-level callbacks run under ``dag.test()``; a notifier object given as a DAG-level callback
does not, so attach it to the validating task.
"""

from __future__ import annotations

import logging
from collections.abc import Iterable, Mapping, Sequence
from typing import TYPE_CHECKING, Any

from airflow.sdk import BaseNotifier

from counterbid.estimators.errors import InputError

if TYPE_CHECKING:
    from counterbid.estimators.checks import CheckResult

from . import alert_targets

__all__ = ["CheckAlertNotifier", "TARGETS", "XCOM_KEY", "build_alert", "check_payload"]

log = logging.getLogger(__name__)

#: XCom key under which the validating task stores its check outcomes.
XCOM_KEY = "counterbid_checks"
TARGETS = ("log", "webhook", "slack", "smtp")


def check_payload(results: Iterable[CheckResult], *, experiment_id: str, ds) -> dict[str, Any]:
    """The JSON-serialisable XCom value a validating task pushes under :data:`XCOM_KEY`."""
    return {
        "experiment_id": str(experiment_id),
        "ds": str(ds),
        "results": [
            {"check": r.check, "severity": r.severity, "passed": bool(r.passed), "observed": r.observed,
             "threshold": r.threshold}
            for r in results
        ],
    }


def build_alert(payload: Mapping[str, Any]) -> dict[str, Any]:
    """Message of one (experiment, day) from a :func:`check_payload`.

    Returns
    -------
    dict
        ``text`` (the compact message), ``experiment_id``, ``ds``, ``worst`` (``error``,
        ``warning`` or ``None``) and ``failed`` (name, severity, observed, threshold of each
        failed check).
    """
    # imported here: the example DAG builds a notifier when Airflow parses it, and the checks load scipy
    from counterbid.estimators.checks import CheckResult, failure_summary, worst_failure

    try:
        results = [CheckResult(r["check"], r["severity"], bool(r["passed"]), r.get("observed"), r.get("threshold"))
                   for r in payload["results"]]
        experiment_id, ds = str(payload["experiment_id"]), payload["ds"]
    except (KeyError, TypeError, ValueError) as exc:
        raise InputError(f"check payload is malformed ({exc}); expected keys experiment_id, ds, results") from None
    failed = [r for r in results if not r.passed]
    worst = worst_failure(results)
    return {
        "text": failure_summary(results, experiment_id=experiment_id, ds=ds),
        "experiment_id": experiment_id,
        "ds": str(ds),
        "worst": worst,
        "failed": [{"check": r.check, "severity": r.severity, "observed": r.observed, "threshold": r.threshold}
                   for r in failed],
    }


class CheckAlertNotifier(BaseNotifier):
    """Send the failed data checks of a validating task to a log, webhook, Slack channel or mailbox.

    Parameters
    ----------
    target : {'log', 'webhook', 'slack', 'smtp'}, optional
        Where to send; default ``log`` (the task log, level WARNING).
    conn_id : str, optional
        Airflow connection of the target (see :mod:`counterbid.operators.alert_targets`).
        ``webhook``: an HTTP connection (base URL; extra keys are headers, ``timeout`` seconds);
        the alert is POSTed as JSON. ``slack``: a ``slackwebhook`` connection (password = the
        webhook token or URL; extra ``timeout``); the alert's text is the message. ``smtp``: an
        SMTP connection (extras ``from_email``, ``to``, ``timeout``, ``retry_limit``).
    task_id : str, optional
        Task whose XCom holds the outcomes; default the task the callback runs for.
    to : sequence of str, optional
        Recipients (``smtp``); default the connection's extra ``to``.
    endpoint : str, optional
        Path after the HTTP connection's base URL (``webhook``).
    retries : int, optional
        Extra tries of a ``webhook`` or ``slack`` post after a connection error, a timeout
        (``webhook``) or a server error, through the provider's own retry (default 2). E-mail
        retries are the SMTP connection's ``retry_limit``.
    retry_args : mapping, optional
        Tenacity settings replacing the ``webhook`` retry (as ``HttpOperator``'s ``retry_args``).

    Raises
    ------
    InputError
        At construction: an unknown target, a missing ``conn_id``, a bad ``retries``, or the
        target's provider not installed (one line naming the ``alerts`` extra).

    Notes
    -----
    Without outcomes in XCom (the task failed before checking) the message names the DAG,
    task, logical date and the exception instead.
    """

    template_fields = ("task_id", "endpoint")

    def __init__(
        self,
        *,
        target: str = "log",
        conn_id: str | None = None,
        task_id: str | None = None,
        to: Sequence[str] | None = None,
        endpoint: str | None = None,
        retries: int = 2,
        retry_args: Mapping[str, Any] | None = None,
    ) -> None:
        super().__init__()
        if target not in TARGETS:
            raise InputError(f"CheckAlertNotifier: `target` must be one of {', '.join(TARGETS)}; got {target!r}")
        if target != "log" and not conn_id:
            raise InputError(f"CheckAlertNotifier: target {target!r} needs `conn_id` (an Airflow connection)")
        if isinstance(retries, bool) or not isinstance(retries, int) or retries < 0:
            raise InputError(f"CheckAlertNotifier: `retries` must be an integer >= 0; got {retries!r}")
        alert_targets.require_provider(target)
        self.target = target
        self.conn_id = conn_id
        self.task_id = task_id
        self.to = list(to) if to else None
        self.endpoint = endpoint
        self.retries = retries
        self.retry_args = dict(retry_args) if retry_args else None

    # -- message --------------------------------------------------------------------------
    def alert_from_context(self, context: Mapping[str, Any]) -> dict[str, Any] | None:
        """The alert for this callback's context, or ``None`` when every check passed."""
        ti = context.get("ti") or context.get("task_instance")
        payload = None
        if ti is not None:
            # Inside a mapped task group, pull this instance's own value (not every index's list).
            map_index = getattr(ti, "map_index", -1)
            extra = {"map_indexes": map_index} if isinstance(map_index, int) and map_index >= 0 else {}
            payload = ti.xcom_pull(task_ids=self.task_id or ti.task_id, key=XCOM_KEY, **extra)
        if payload:
            alert = build_alert(payload)
            return alert if alert["failed"] else None
        dag_id = getattr(context.get("dag"), "dag_id", None) or getattr(ti, "dag_id", "?")
        task = getattr(ti, "task_id", "?")
        day = context.get("ds") or context.get("logical_date")
        exc = context.get("exception")
        text = f"{dag_id}.{task} {day}: failed before its data checks were recorded"
        if exc is not None:
            text += f": {type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''}"
        return {"text": text, "experiment_id": None, "ds": None if day is None else str(day), "worst": "error", "failed": []}

    def notify(self, context) -> None:
        alert = self.alert_from_context(context)
        if alert is None:
            self.log.info("counterbid checks: nothing failed, no alert sent")
            return
        try:
            self.send(alert)
        except Exception as exc:
            # Airflow logs the callback's failure too; the task keeps its own outcome and reason.
            self.log.error("counterbid checks alert NOT delivered (the task's outcome stands): %s", exc)
            raise

    # -- targets --------------------------------------------------------------------------
    def send(self, alert: Mapping[str, Any]) -> None:
        """Deliver ``alert`` (from :func:`build_alert`) to the configured target.

        Raises :class:`~counterbid.operators.alert_targets.AlertDeliveryError` when the target
        refuses it or does not answer in time.
        """
        if self.target == "log":
            self.log.warning("counterbid checks alert:\n%s", alert["text"])
        elif self.target == "webhook":
            status = alert_targets.post_webhook(self.conn_id, alert, endpoint=self.endpoint, retries=self.retries,
                                                retry_args=self.retry_args)
            self.log.info("counterbid checks alert posted to webhook %r (%s)", self.conn_id, status)
        elif self.target == "slack":
            status = alert_targets.post_slack(self.conn_id, alert["text"], retries=self.retries)
            self.log.info("counterbid checks alert posted to slack %r (%s)", self.conn_id, status)
        else:
            to = alert_targets.mail_alert(self.conn_id, alert, to=self.to)
            self.log.info("counterbid checks alert mailed to %s", ", ".join(to))
