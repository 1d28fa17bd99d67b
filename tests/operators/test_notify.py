"""The check-alert notifier against real servers on 127.0.0.1 (HTTP, Slack-style webhook, SMTP), and
under a real dag.test(): delivered content, a refused delivery, a timeout, and a failed alert that
leaves the task's own outcome and failure reason as they were."""

from __future__ import annotations

import json
import logging
import os
import subprocess
import sys
import textwrap
import time

import pytest

from counterbid.estimators import InputError
from counterbid.estimators.checks import CheckResult
from counterbid.operators import alert_targets
from counterbid.operators.alert_targets import AlertDeliveryError
from counterbid.operators.notify import CheckAlertNotifier, build_alert, check_payload

from ..alert_servers import HttpSink, SilentPort, SmtpSink, http_conn, slack_conn, smtp_conn

RESULTS = [
    CheckResult("sample_ratio", "error", False, 2.5e-5, 1e-3),
    CheckResult("drift", "warning", False, 4e-7, 1e-3),
    CheckResult("shading", "warning", True, 0.0, 0.05),
]
PAYLOAD = check_payload(RESULTS, experiment_id="featured-rows", ds="2026-03-02")


def test_alert_message_lists_failed_checks_with_observed_and_threshold():
    alert = build_alert(PAYLOAD)
    assert alert["worst"] == "error"
    assert alert["text"].splitlines() == [
        "featured-rows 2026-03-02: 2 of 3 checks failed (worst: error)",
        "  sample_ratio [error] FAILED: observed 2.5e-05 vs threshold 0.001",
        "  drift [warning] FAILED: observed 4e-07 vs threshold 0.001",
    ]
    assert [f["check"] for f in alert["failed"]] == ["sample_ratio", "drift"]
    with pytest.raises(InputError, match="check payload is malformed"):
        build_alert({"results": []})


TEXT = build_alert(PAYLOAD)["text"]


def test_webhook_posts_the_message_through_the_http_provider(monkeypatch):
    with HttpSink(status=204) as sink:
        monkeypatch.setenv("AIRFLOW_CONN_QUILLFEN_ALERTS", http_conn(sink.url, **{"X-Alert-Source": "counterbid"}))
        CheckAlertNotifier(target="webhook", conn_id="quillfen_alerts", endpoint="/alerts/quillfen").send(build_alert(PAYLOAD))
    assert len(sink.received) == 1
    got = sink.received[0]
    assert got["path"] == "/alerts/quillfen"
    assert got["headers"]["X-Alert-Source"] == "counterbid"  # extra keys are headers (the HTTP provider's layout)
    assert got["headers"]["Content-Type"] == "application/json"
    assert got["body"] == json.loads(json.dumps(build_alert(PAYLOAD)))  # the whole payload, as it was
    assert got["body"]["failed"][1] == {"check": "drift", "severity": "warning", "observed": 4e-7, "threshold": 1e-3}


def test_webhook_refused_is_retried_then_reported(monkeypatch):
    """HTTP 500 is retried by the hook's tenacity retry (retries=1: two POSTs), then fails naming the status."""
    with HttpSink(status=500) as sink:
        monkeypatch.setenv("AIRFLOW_CONN_QUILLFEN_ALERTS", http_conn(sink.url))
        notifier = CheckAlertNotifier(target="webhook", conn_id="quillfen_alerts", retries=1)
        with pytest.raises(AlertDeliveryError, match=r"^alert to webhook 'quillfen_alerts' not delivered: HTTP 500"):
            notifier.send(build_alert(PAYLOAD))
    assert len(sink.received) == 2
    assert sink.received[0]["body"] == sink.received[1]["body"]


def test_webhook_timeout_is_the_connections(monkeypatch):
    """A server that never answers: the connection's ``timeout`` extra (1 s) ends each of the two tries."""
    with SilentPort() as silent:
        monkeypatch.setenv("AIRFLOW_CONN_QUILLFEN_ALERTS", http_conn(silent.url, timeout=1))
        notifier = CheckAlertNotifier(target="webhook", conn_id="quillfen_alerts", retries=1)
        started = time.monotonic()
        with pytest.raises(AlertDeliveryError, match=r"not delivered: ReadTimeout: .*Read timed out"):
            notifier.send(build_alert(PAYLOAD))
        elapsed = time.monotonic() - started
    assert 2.0 <= elapsed < 15.0  # two 1 s timeouts and one 1 s wait; far below the 30 s default


def test_webhook_rejects_the_former_connection_layout(monkeypatch):
    monkeypatch.setenv("AIRFLOW_CONN_QUILLFEN_ALERTS", json.dumps(
        {"conn_type": "http", "host": "127.0.0.1", "port": 9, "extra": {"endpoint": "/x", "headers": {"A": "b"}}}))
    with pytest.raises(InputError, match="extra 'endpoint', 'headers' is not read any more"):
        CheckAlertNotifier(target="webhook", conn_id="quillfen_alerts").send(build_alert(PAYLOAD))


def test_slack_incoming_webhook_gets_the_text(monkeypatch):
    with HttpSink(status=200) as sink:
        monkeypatch.setenv("AIRFLOW_CONN_QUILLFEN_SLACK", slack_conn(sink.url))
        CheckAlertNotifier(target="slack", conn_id="quillfen_slack").send(build_alert(PAYLOAD))
    assert [r["path"] for r in sink.received] == ["/quillfen/checks-room"]  # host + "/" + the token
    assert sink.received[0]["body"] == {"text": TEXT}


def test_slack_refused_is_retried_then_reported(monkeypatch):
    """slack_sdk's server-error retry handler tries again once (retries=1), then the hook reports the status."""
    with HttpSink(status=500) as sink:
        monkeypatch.setenv("AIRFLOW_CONN_QUILLFEN_SLACK", slack_conn(sink.url))
        with pytest.raises(AlertDeliveryError, match=r"^alert to slack 'quillfen_slack' not delivered: .*Status Code: 500"):
            CheckAlertNotifier(target="slack", conn_id="quillfen_slack", retries=1).send(build_alert(PAYLOAD))
    assert len(sink.received) == 2


def test_slack_timeout_is_the_connections(monkeypatch):
    with SilentPort() as silent:
        monkeypatch.setenv("AIRFLOW_CONN_QUILLFEN_SLACK", slack_conn(silent.url, timeout=1))
        started = time.monotonic()
        with pytest.raises(AlertDeliveryError, match=r"not delivered: TimeoutError: timed out"):
            CheckAlertNotifier(target="slack", conn_id="quillfen_slack", retries=0).send(build_alert(PAYLOAD))
    assert time.monotonic() - started < 15.0


def test_mail_is_delivered_through_the_smtp_provider(monkeypatch):
    with SmtpSink() as smtp:
        monkeypatch.setenv("AIRFLOW_CONN_QUILLFEN_MAIL", smtp_conn(smtp.port))
        CheckAlertNotifier(target="smtp", conn_id="quillfen_mail").send(build_alert(PAYLOAD))
    assert len(smtp.messages) == 1
    got = smtp.messages[0]
    assert got["from"] == "checks@quillfen.example" and got["to"] == ["pricing-desk@quillfen.example"]
    message = got["message"]
    assert message["Subject"] == "counterbid checks: featured-rows 2026-03-02 (error)"
    html = next(part for part in message.walk() if part.get_content_type() == "text/html").get_content()
    assert html == "<pre>" + TEXT + "</pre>"  # nothing to escape in this text


def test_mail_recipient_refused_is_reported(monkeypatch):
    """A refused recipient (550): the SMTP hook tries ``retry_limit`` + 1 times, then the refusal is the reason."""
    with SmtpSink(refuse=("pricing-desk@quillfen.example",)) as smtp:
        monkeypatch.setenv("AIRFLOW_CONN_QUILLFEN_MAIL", smtp_conn(smtp.port, retry_limit=1))
        with pytest.raises(AlertDeliveryError, match=r"^alert to smtp 'quillfen_mail' not delivered: SMTPRecipientsRefused"):
            CheckAlertNotifier(target="smtp", conn_id="quillfen_mail").send(build_alert(PAYLOAD))
    assert smtp.messages == [] and smtp.refused == ["pricing-desk@quillfen.example"] * 2


def test_mail_timeout_is_the_connections(monkeypatch):
    """A server that never sends its greeting: the connection's ``timeout`` extra (1 s) ends the wait."""
    with SilentPort() as silent:
        monkeypatch.setenv("AIRFLOW_CONN_QUILLFEN_MAIL", smtp_conn(silent.port, timeout=1, retry_limit=0))
        started = time.monotonic()
        # the hook wraps smtplib's error in its own; the reason names the timeout underneath
        with pytest.raises(AlertDeliveryError, match=r"not delivered: AirflowException: Unable to connect to smtp server "
                                                     r"\(TimeoutError: timed out\)$"):
            CheckAlertNotifier(target="smtp", conn_id="quillfen_mail").send(build_alert(PAYLOAD))
    assert time.monotonic() - started < 15.0


def test_log_target_is_the_default(caplog, capsys):
    notifier = CheckAlertNotifier()
    with caplog.at_level(logging.WARNING):
        notifier.send(build_alert(PAYLOAD))
    # Airflow routes its loggers through structlog (stdout) or the logging module, by configuration
    logged = caplog.text + capsys.readouterr().out
    assert "featured-rows 2026-03-02: 2 of 3 checks failed" in logged
    assert "drift [warning] FAILED: observed 4e-07 vs threshold 0.001" in logged


def test_bad_notifier_settings_fail_at_construction(monkeypatch):
    with pytest.raises(InputError, match="`target` must be one of log, webhook, slack, smtp"):
        CheckAlertNotifier(target="pager")
    with pytest.raises(InputError, match="needs `conn_id`"):
        CheckAlertNotifier(target="webhook")
    with pytest.raises(InputError, match="`retries` must be an integer >= 0"):
        CheckAlertNotifier(target="slack", conn_id="quillfen_slack", retries=-1)
    # a provider that is not installed: one line naming the extra, when the DAG is parsed
    monkeypatch.setitem(alert_targets.PROVIDERS, "slack", ("airflow.providers.not_installed_here", "apache-airflow-providers-slack"))
    with pytest.raises(InputError, match=r"target 'slack' needs apache-airflow-providers-slack: pip install 'counterbid\[alerts\]'"):
        CheckAlertNotifier(target="slack", conn_id="quillfen_slack")


DAG_FILE = textwrap.dedent(
    '''
    import json

    import pendulum
    from airflow.sdk import DAG, task
    from airflow.sdk.exceptions import AirflowFailException

    from counterbid.estimators.checks import CheckResult
    from counterbid.operators.notify import XCOM_KEY, CheckAlertNotifier, check_payload

    def outcomes(ti, experiment_id, passed, warning_passed=True):
        results = [CheckResult("sample_ratio", "error", passed, 0.4 if passed else 2.5e-5, 1e-3),
                   CheckResult("drift", "warning", warning_passed, 0.2 if warning_passed else 4e-7, 1e-3)]
        ti.xcom_push(key=XCOM_KEY, value=check_payload(results, experiment_id=experiment_id, ds="2026-03-02"))

    def failing(task_id, experiment_id, alert):
        @task(task_id=task_id, on_failure_callback=alert, retries=0)
        def validate(ti=None):
            outcomes(ti, experiment_id, passed=False)
            raise AirflowFailException(f"{experiment_id} 2026-03-02: sample_ratio failed in {task_id}")
        return validate()

    with DAG("quillfen_check_alerts", schedule=None, start_date=pendulum.datetime(2026, 3, 1, tz="UTC"),
             catchup=False) as dag:
        failing("validate_hooked", "featured-rows", CheckAlertNotifier(target="webhook", conn_id="quillfen_hook",
                                                                     endpoint="/checks"))
        failing("validate_mailed", "wide-grid", CheckAlertNotifier(target="smtp", conn_id="quillfen_mail"))
        failing("validate_refused", "tall-cards", CheckAlertNotifier(target="webhook", conn_id="quillfen_refusing",
                                                                   retries=1))
        failing("validate_unanswered", "short-list", CheckAlertNotifier(target="slack", conn_id="quillfen_silent",
                                                                      retries=0))

        @task(on_success_callback=CheckAlertNotifier(target="smtp", conn_id="quillfen_refusing_mail"))
        def warned(ti=None):
            outcomes(ti, "loose-grid", passed=True, warning_passed=False)

        @task(on_success_callback=CheckAlertNotifier(target="webhook", conn_id="quillfen_hook", endpoint="/checks"))
        def settled(ti=None):
            outcomes(ti, "calm-rows", passed=True)

        warned()
        settled()

    if __name__ == "__main__":
        run = dag.test(logical_date=pendulum.datetime(2026, 3, 2, tz="UTC"))
        states = {ti.task_id: str(getattr(ti.state, "value", ti.state)) for ti in run.get_task_instances()}
        print("TASK STATES " + json.dumps(states, sort_keys=True))
    '''
)


def _run_alert_dag(tmp_path, connections: dict[str, str]) -> tuple[dict, str]:
    home, dags = tmp_path / "airflow", tmp_path / "dags"
    dags.mkdir()
    (dags / "quillfen_check_alerts.py").write_text(DAG_FILE)
    env = {k: v for k, v in os.environ.items() if not k.startswith(("AIRFLOW", "COUNTERBID_"))}
    env.update({"AIRFLOW_HOME": str(home), "AIRFLOW__CORE__DAGS_FOLDER": str(dags), "AIRFLOW__CORE__LOAD_EXAMPLES": "False",
                **{f"AIRFLOW_CONN_{name.upper()}": conn for name, conn in connections.items()}})
    airflow = os.path.join(os.path.dirname(sys.executable), "airflow")
    subprocess.run([airflow, "db", "migrate"], env=env, check=True, capture_output=True, timeout=300)
    run = subprocess.run([sys.executable, str(dags / "quillfen_check_alerts.py")], env=env, capture_output=True,
                         text=True, timeout=300)
    out = run.stdout + run.stderr
    line = next((x for x in run.stdout.splitlines() if x.startswith("TASK STATES ")), None)
    assert line is not None, out[-4000:]
    return json.loads(line.removeprefix("TASK STATES ")), out


@pytest.mark.slow
def test_alerts_under_dag_test_delivered_refused_and_timed_out(tmp_path):
    """One dag.test run, six tasks, each alerting through a real local server.

    Delivered: webhook (HTTP 204) and e-mail (aiosmtpd). Refused: webhook answering 500 (two
    tries), a mail recipient refused (550) on a task that passed with a warning. Timed out: a Slack
    webhook that never answers (1 s connection timeout). Each failed task stays ``failed`` with its
    own check failure logged, and the passed ones stay ``success``, whatever their alert did.
    """
    with HttpSink(204) as hook, HttpSink(500) as refusing, SmtpSink() as mail, \
            SmtpSink(refuse=("pricing-desk@quillfen.example",)) as refusing_mail, SilentPort() as silent:
        states, log = _run_alert_dag(tmp_path, {
            "quillfen_hook": http_conn(hook.url), "quillfen_refusing": http_conn(refusing.url),
            "quillfen_mail": smtp_conn(mail.port), "quillfen_refusing_mail": smtp_conn(refusing_mail.port, retry_limit=0),
            "quillfen_silent": slack_conn(silent.url, timeout=1),
        })
    assert states == {"validate_hooked": "failed", "validate_mailed": "failed", "validate_refused": "failed",
                      "validate_unanswered": "failed", "warned": "success", "settled": "success"}, log[-4000:]
    # delivered: one POST (the passing task sends nothing) and one mail, each with the message as built
    assert [r["path"] for r in hook.received] == ["/checks"], log[-4000:]
    assert hook.received[0]["body"]["text"].splitlines() == [
        "featured-rows 2026-03-02: 1 of 2 checks failed (worst: error)",
        "  sample_ratio [error] FAILED: observed 2.5e-05 vs threshold 0.001",
    ]
    assert [m["message"]["Subject"] for m in mail.messages] == ["counterbid checks: wide-grid 2026-03-02 (error)"]
    # refused and timed out: tried, not delivered, and the log says so beside the task's own failure
    assert len(refusing.received) == 2 and refusing_mail.refused == ["pricing-desk@quillfen.example"]
    for task_id, experiment_id, reason in [
        ("validate_refused", "tall-cards", "alert to webhook 'quillfen_refusing' not delivered: HTTP 500"),
        ("validate_unanswered", "short-list", "alert to slack 'quillfen_silent' not delivered: TimeoutError: timed out"),
    ]:
        failure = f"{experiment_id} 2026-03-02: sample_ratio failed in {task_id}"
        assert failure in log, log[-4000:]
        assert reason in log, log[-4000:]
        assert log.index(failure) < log.index(reason)  # the check failed first; the alert's failure came after
    assert "alert to smtp 'quillfen_refusing_mail' not delivered: SMTPRecipientsRefused" in log
    assert "alert NOT delivered (the task's outcome stands)" in log
