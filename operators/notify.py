"""Alerts on failed data checks: an Airflow notifier posting one compact message.

The validating task pushes its outcomes to XCom under :data:`XCOM_KEY` as
``{"experiment_id", "ds", "results": [CheckResult fields...]}`` (see :func:`check_payload`); the
notifier, attached as a task's ``on_failure_callback`` (error checks) or ``on_success_callback``
(it stays silent when nothing failed), pulls them and sends the message to the log (default), an
HTTP webhook or e-mail, both through Airflow connections.

Task-level callbacks run under ``dag.test()``; a notifier object given as a DAG-level callback
does not, so attach it to the validating task.
"""

from __future__ import annotations

import json
import logging
import urllib.error
import urllib.request
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

from airflow.sdk import BaseHook, BaseNotifier

from counterbid.estimators.checks import CheckResult, failure_summary, worst_failure
from counterbid.estimators.errors import InputError

__all__ = ["CheckAlertNotifier", "TARGETS", "XCOM_KEY", "build_alert", "check_payload"]

log = logging.getLogger(__name__)

#: XCom key under which the validating task stores its check outcomes.
XCOM_KEY = "counterbid_checks"
TARGETS = ("log", "webhook", "smtp")


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
    """Send the failed data checks of a validating task to a log, webhook or mailbox.

    Parameters
    ----------
    target : {'log', 'webhook', 'smtp'}, optional
        Where to send; default ``log`` (the task log, level WARNING).
    conn_id : str, optional
        Airflow connection of the target. ``webhook``: an HTTP connection (``schema`` http or
        https, ``host``, ``port``; extra ``endpoint`` path and ``headers``); the message is
        POSTed as JSON. ``smtp``: an SMTP connection for the SMTP provider's hook; extra ``to``
        (list of addresses) unless ``to`` is given.
    task_id : str, optional
        Task whose XCom holds the outcomes; default the task the callback runs for.
    to : sequence of str, optional
        Recipients (``smtp``).
    timeout : float, optional
        Seconds for the webhook request.

    Notes
    -----
    Without outcomes in XCom (the task failed before checking) the message names the DAG,
    task, logical date and the exception instead.
    """

    template_fields = ("task_id",)

    def __init__(
        self,
        *,
        target: str = "log",
        conn_id: str | None = None,
        task_id: str | None = None,
        to: Sequence[str] | None = None,
        timeout: float = 10.0,
    ) -> None:
        super().__init__()
        if target not in TARGETS:
            raise InputError(f"CheckAlertNotifier: `target` must be one of {', '.join(TARGETS)}; got {target!r}")
        if target != "log" and not conn_id:
            raise InputError(f"CheckAlertNotifier: target {target!r} needs `conn_id` (an Airflow connection)")
        if not (isinstance(timeout, (int, float)) and timeout > 0):
            raise InputError(f"CheckAlertNotifier: `timeout` must be > 0; got {timeout!r}")
        self.target = target
        self.conn_id = conn_id
        self.task_id = task_id
        self.to = list(to) if to else None
        self.timeout = float(timeout)

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
        self.send(alert)

    # -- targets --------------------------------------------------------------------------
    def send(self, alert: Mapping[str, Any]) -> None:
        """Deliver ``alert`` (from :func:`build_alert`) to the configured target."""
        if self.target == "log":
            self.log.warning("counterbid checks alert:\n%s", alert["text"])
        elif self.target == "webhook":
            self._post(alert)
        else:
            self._mail(alert)

    def _post(self, alert: Mapping[str, Any]) -> None:
        conn = BaseHook.get_connection(self.conn_id)
        extra = conn.extra_dejson or {}
        scheme = conn.schema or "http"
        if scheme not in ("http", "https") or not conn.host:
            raise InputError(f"connection {self.conn_id!r}: webhook needs schema http/https and a host")
        port = f":{conn.port}" if conn.port else ""
        endpoint = "/" + str(extra.get("endpoint", "")).lstrip("/")
        url = f"{scheme}://{conn.host}{port}{endpoint}"
        headers = {"Content-Type": "application/json", **{str(k): str(v) for k, v in dict(extra.get("headers", {})).items()}}
        body = json.dumps(dict(alert), default=str).encode("utf-8")
        request = urllib.request.Request(url, data=body, headers=headers, method="POST")
        try:
            with urllib.request.urlopen(request, timeout=self.timeout) as response:  # noqa: S310 (scheme checked)
                status = response.status
        except urllib.error.HTTPError as exc:
            raise RuntimeError(f"webhook {self.conn_id!r} answered HTTP {exc.code}") from None
        self.log.info("counterbid checks alert posted to %s (HTTP %s)", url, status)

    def _mail(self, alert: Mapping[str, Any]) -> None:
        from airflow.providers.smtp.hooks.smtp import SmtpHook

        with SmtpHook(smtp_conn_id=self.conn_id) as hook:
            to = self.to or hook.conn.extra_dejson.get("to")  # type: ignore[union-attr]
            if not to:
                raise InputError(f"connection {self.conn_id!r}: no recipients (give `to` or extra 'to')")
            day = alert.get("ds") or ""
            subject = f"counterbid checks: {alert.get('experiment_id') or 'pipeline'} {day} ({alert.get('worst')})"
            html = "<pre>" + _escape(alert["text"]) + "</pre>"
            hook.send_email_smtp(to=to, subject=subject, html_content=html)
        self.log.info("counterbid checks alert mailed to %s", to)


def _escape(text: str) -> str:
    return text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
