"""Delivery of one check alert through Airflow's providers: HTTP webhook, Slack incoming webhook, e-mail.

Each function sends the message :func:`counterbid.operators.notify.build_alert` built, through the
provider's hook and the Airflow connection ``conn_id``; timeouts and retries are the providers' own
settings (the connection's ``timeout`` extra; the SMTP connection's ``retry_limit``; for the two
webhooks, the HTTP hook's tenacity retry and slack_sdk's retry handlers, ``retries`` extra tries).
A delivery that fails raises :class:`AlertDeliveryError`, one line naming the target, the
connection and the reason.

The providers are the ``alerts`` extra (``pip install 'counterbid[alerts]'``); each is imported
only when its target is used.
"""

from __future__ import annotations

import importlib.util
import json
from collections.abc import Mapping, Sequence
from html import escape
from typing import Any

from counterbid.estimators.errors import InputError

__all__ = ["ALERTS_EXTRA", "DEFAULT_HTTP_TIMEOUT", "PROVIDERS", "AlertDeliveryError", "mail_alert", "post_slack",
           "post_webhook", "require_provider"]

ALERTS_EXTRA = "pip install 'counterbid[alerts]'"
#: Provider module each target needs, and the provider's distribution name.
PROVIDERS = {
    "webhook": ("airflow.providers.http", "apache-airflow-providers-http"),
    "slack": ("airflow.providers.slack", "apache-airflow-providers-slack"),
    "smtp": ("airflow.providers.smtp", "apache-airflow-providers-smtp"),
}
#: Seconds an HTTP webhook may take when its connection sets no ``timeout`` extra (the HTTP hook
#: alone would wait forever; 30 s is the SMTP provider's and slack_sdk's own default).
DEFAULT_HTTP_TIMEOUT = 30
#: Extras of the former hand-written webhook client, refused with the layout the HTTP provider reads.
_OLD_WEBHOOK_EXTRAS = ("endpoint", "headers")


class AlertDeliveryError(RuntimeError):
    """An alert could not be delivered: the message names the target, the connection and the reason."""


def require_provider(target: str) -> None:
    """Raise :class:`InputError` (one line naming the extra) when ``target``'s provider is not installed."""
    if target not in PROVIDERS:
        return
    module, dist = PROVIDERS[target]
    try:
        found = importlib.util.find_spec(module) is not None
    except ModuleNotFoundError:
        found = False
    if not found:
        raise InputError(f"CheckAlertNotifier: target {target!r} needs {dist}: {ALERTS_EXTRA}")


def _one_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {text[0]}" if text else type(exc).__name__


def _delivery_error(target: str, conn_id: str, failure: BaseException | str) -> AlertDeliveryError:
    """The one failure line of every target: ``alert to <target> '<conn_id>' not delivered: <reason>``."""
    reason = failure if isinstance(failure, str) else _reason(failure)
    return AlertDeliveryError(f"alert to {target} {conn_id!r} not delivered: {reason}")


def _reason(exc: BaseException) -> str:
    """``Type: first line`` of ``exc``, and of the error underneath when a hook wrapped it."""
    root = exc
    while (root.__cause__ or root.__context__) is not None:
        root = root.__cause__ or root.__context__
    return _one_line(exc) if root is exc else f"{_one_line(exc)} ({_one_line(root)})"


def _http_retry_args(retries: int) -> dict[str, Any]:
    """Tenacity settings for ``HttpHook.run_with_advanced_retry``: connection errors, timeouts and 5xx."""
    import requests
    import tenacity

    def last_outcome(state):  # after the last try: the last response, or its exception re-raised
        return state.outcome.result()

    return {
        "stop": tenacity.stop_after_attempt(retries + 1),
        "wait": tenacity.wait_exponential(multiplier=1, max=8),
        "retry": (tenacity.retry_if_exception_type((requests.ConnectionError, requests.Timeout))
                  | tenacity.retry_if_result(lambda response: response.status_code >= 500)),
        "retry_error_callback": last_outcome,
    }


def post_webhook(conn_id: str, alert: Mapping[str, Any], *, endpoint: str | None = None, retries: int = 2,
                 retry_args: Mapping[str, Any] | None = None) -> str:
    """POST ``alert`` as JSON through the HTTP provider's ``HttpHook``.

    Parameters
    ----------
    conn_id : str
        HTTP connection: ``schema``, ``host``, ``port`` (or a whole URL in ``host``), login and
        password for basic auth; extra keys are request headers, except the hook's own options
        (``timeout``, ``verify``, ``proxies``, ...). Without a ``timeout`` extra,
        :data:`DEFAULT_HTTP_TIMEOUT` seconds.
    alert : mapping
        From :func:`~counterbid.operators.notify.build_alert`; sent as it is.
    endpoint : str, optional
        Path after the connection's base URL.
    retries : int
        Extra tries after a connection error, a timeout or an HTTP 5xx answer (exponential wait,
        1 s to 8 s), through ``HttpHook.run_with_advanced_retry``.
    retry_args : mapping, optional
        Tenacity settings replacing the default retry (as ``HttpOperator``'s ``retry_args``).

    Returns
    -------
    str
        ``"HTTP <status>"`` of the answer.

    References
    ----------
    Apache Airflow HTTP provider, ``HttpHook.run_with_advanced_retry``.
    """
    from airflow.providers.http.hooks.http import HttpHook
    from airflow.sdk import BaseHook

    conn = BaseHook.get_connection(conn_id)
    extra = conn.extra_dejson or {}
    old = [k for k in _OLD_WEBHOOK_EXTRAS if k in extra]
    if old:
        raise InputError(f"connection {conn_id!r}: extra {', '.join(map(repr, old))} is not read any more; "
                         "headers are top-level extra keys and the path is the notifier's `endpoint`")
    options: dict[str, Any] = {"check_response": False}
    if extra.get("timeout") is None:
        options["timeout"] = DEFAULT_HTTP_TIMEOUT
    hook = HttpHook(method="POST", http_conn_id=conn_id)
    body = json.loads(json.dumps(dict(alert), default=str))
    try:
        response = hook.run_with_advanced_retry(dict(retry_args) if retry_args else _http_retry_args(retries),
                                                endpoint=endpoint, json=body, extra_options=options)
    except Exception as exc:  # noqa: BLE001 (any failure of the request is reported the same way)
        raise _delivery_error("webhook", conn_id, exc) from exc
    if not response.ok:
        raise _delivery_error("webhook", conn_id, f"HTTP {response.status_code} {response.reason}")
    return f"HTTP {response.status_code}"


def post_slack(conn_id: str, text: str, *, retries: int = 2) -> str:
    """Post ``text`` to a Slack incoming webhook through the Slack provider's ``SlackWebhookHook``.

    Parameters
    ----------
    conn_id : str
        Connection of type ``slackwebhook``: password = the webhook token (the path after
        ``hooks.slack.com/services/``, or the whole webhook URL); host = another endpoint
        (default ``hooks.slack.com/services``); extras ``timeout`` (seconds; slack_sdk's default
        30) and ``proxy``.
    text : str
        The alert's text, sent as the message's ``text``.
    retries : int
        Extra tries through slack_sdk's retry handlers: connection errors, HTTP 500/503 and 429.

    Returns
    -------
    str
        ``"HTTP <status>"`` of the answer.

    References
    ----------
    Apache Airflow Slack provider, ``SlackWebhookHook``; slack_sdk ``http_retry`` handlers.
    """
    from airflow.providers.slack.hooks.slack_webhook import SlackWebhookHook
    from slack_sdk.http_retry import ConnectionErrorRetryHandler, RateLimitErrorRetryHandler
    from slack_sdk.http_retry.builtin_handlers import ServerErrorRetryHandler

    handlers = [ConnectionErrorRetryHandler(max_retry_count=retries), ServerErrorRetryHandler(max_retry_count=retries),
                RateLimitErrorRetryHandler(max_retry_count=retries)] if retries else []
    try:
        response = SlackWebhookHook(slack_webhook_conn_id=conn_id, retry_handlers=handlers).send(text=text)
    except Exception as exc:  # noqa: BLE001
        raise _delivery_error("slack", conn_id, exc) from exc
    return f"HTTP {response.status_code}"


def mail_alert(conn_id: str, alert: Mapping[str, Any], *, to: Sequence[str] | None = None) -> list[str]:
    """Mail ``alert`` through the SMTP provider's ``SmtpHook``.

    Parameters
    ----------
    conn_id : str
        SMTP connection (host, port, login, password; extras ``from_email``, ``to``, ``timeout``
        (default 30 s), ``retry_limit`` (default 5), ``disable_ssl``, ``disable_tls``).
    alert : mapping
        From :func:`~counterbid.operators.notify.build_alert`.
    to : sequence of str, optional
        Recipients; default the connection's extra ``to``.

    Returns
    -------
    list of str
        The recipients.

    References
    ----------
    Apache Airflow SMTP provider, ``SmtpHook.send_email_smtp``.
    """
    from airflow.providers.smtp.hooks.smtp import SmtpHook

    day = alert.get("ds") or ""
    subject = f"counterbid checks: {alert.get('experiment_id') or 'pipeline'} {day} ({alert.get('worst')})"
    html = "<pre>" + escape(alert["text"], quote=False) + "</pre>"
    try:
        with SmtpHook(smtp_conn_id=conn_id) as hook:
            recipients = to or hook.conn.extra_dejson.get("to")
            if not recipients:
                raise InputError(f"connection {conn_id!r}: no recipients (give `to` or extra 'to')")
            hook.send_email_smtp(to=recipients, subject=subject, html_content=html)
    except InputError:
        raise
    except Exception as exc:  # noqa: BLE001
        raise _delivery_error("smtp", conn_id, exc) from exc
    return [recipients] if isinstance(recipients, str) else list(recipients)
