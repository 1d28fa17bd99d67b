"""The check-alert notifier against a real HTTP server on 127.0.0.1, and under a real dag.test()."""

from __future__ import annotations

import http.server
import json
import logging
import os
import subprocess
import sys
import textwrap
import threading

import pytest

from counterbid.estimators import InputError
from counterbid.estimators.checks import CheckResult
from counterbid.operators.notify import CheckAlertNotifier, build_alert, check_payload

RESULTS = [
    CheckResult("sample_ratio", "error", False, 2.5e-5, 1e-3),
    CheckResult("drift", "warning", False, 4e-7, 1e-3),
    CheckResult("shading", "warning", True, 0.0, 0.05),
]
PAYLOAD = check_payload(RESULTS, experiment_id="featured-rows", ds="2026-03-02")


class _Sink(http.server.BaseHTTPRequestHandler):
    received: list = []

    def do_POST(self):  # noqa: N802 (http.server API)
        body = self.rfile.read(int(self.headers["Content-Length"]))
        type(self).received.append({"path": self.path, "headers": dict(self.headers), "body": json.loads(body)})
        self.send_response(204)
        self.end_headers()

    def log_message(self, *args):
        pass


@pytest.fixture
def sink():
    handler = type("Sink", (_Sink,), {"received": []})
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), handler)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    yield server, handler.received
    server.shutdown()
    server.server_close()


def _conn_json(port: int) -> str:
    return json.dumps({"conn_type": "http", "host": "127.0.0.1", "port": port, "schema": "http",
                       "extra": {"endpoint": "/alerts/quillfen", "headers": {"X-Alert-Source": "counterbid"}}})


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


def test_webhook_posts_the_message(sink, monkeypatch):
    server, received = sink
    monkeypatch.setenv("AIRFLOW_CONN_QUILLFEN_ALERTS", _conn_json(server.server_address[1]))
    CheckAlertNotifier(target="webhook", conn_id="quillfen_alerts").send(build_alert(PAYLOAD))
    assert len(received) == 1
    got = received[0]
    assert got["path"] == "/alerts/quillfen"
    assert got["headers"]["X-Alert-Source"] == "counterbid"
    assert got["body"]["experiment_id"] == "featured-rows" and got["body"]["ds"] == "2026-03-02"
    assert "sample_ratio [error] FAILED: observed 2.5e-05 vs threshold 0.001" in got["body"]["text"]
    assert got["body"]["failed"][1] == {"check": "drift", "severity": "warning", "observed": 4e-7, "threshold": 1e-3}


def test_log_target_is_the_default(caplog, capsys):
    notifier = CheckAlertNotifier()
    with caplog.at_level(logging.WARNING):
        notifier.send(build_alert(PAYLOAD))
    # Airflow routes its loggers through structlog (stdout) or the logging module, by configuration
    logged = caplog.text + capsys.readouterr().out
    assert "featured-rows 2026-03-02: 2 of 3 checks failed" in logged
    assert "drift [warning] FAILED: observed 4e-07 vs threshold 0.001" in logged


def test_bad_notifier_settings_fail_at_construction():
    with pytest.raises(InputError, match="`target` must be one of log, webhook, smtp"):
        CheckAlertNotifier(target="pager")
    with pytest.raises(InputError, match="needs `conn_id`"):
        CheckAlertNotifier(target="webhook")


DAG_FILE = textwrap.dedent(
    '''
    import pendulum
    from airflow.sdk import DAG, task

    from counterbid.estimators.checks import CheckResult
    from counterbid.operators.notify import XCOM_KEY, CheckAlertNotifier, check_payload

    alert = CheckAlertNotifier(target="webhook", conn_id="quillfen_alerts")

    with DAG("quillfen_check_alerts", schedule=None, start_date=pendulum.datetime(2026, 3, 1, tz="UTC"),
             catchup=False) as dag:

        @task(on_failure_callback=alert, retries=0)
        def validate(ti=None):
            results = [CheckResult("sample_ratio", "error", False, 2.5e-5, 1e-3),
                       CheckResult("drift", "warning", True, 0.2, 1e-3)]
            ti.xcom_push(key=XCOM_KEY, value=check_payload(results, experiment_id="featured-rows", ds="2026-03-02"))
            raise RuntimeError("featured-rows 2026-03-02: 1 error check failed")

        @task(on_success_callback=alert)
        def settled(ti=None):
            results = [CheckResult("sample_ratio", "error", True, 0.4, 1e-3)]
            ti.xcom_push(key=XCOM_KEY, value=check_payload(results, experiment_id="maker-spotlight", ds="2026-03-02"))

        validate()
        settled()

    if __name__ == "__main__":
        dag.test(logical_date=pendulum.datetime(2026, 3, 2, tz="UTC"))
    '''
)


@pytest.mark.slow
def test_task_failure_callback_posts_under_dag_test(sink, tmp_path):
    server, received = sink
    home, dags = tmp_path / "airflow", tmp_path / "dags"
    dags.mkdir()
    (dags / "quillfen_check_alerts.py").write_text(DAG_FILE)
    env = {
        **os.environ,
        "AIRFLOW_HOME": str(home),
        "AIRFLOW__CORE__DAGS_FOLDER": str(dags),
        "AIRFLOW__CORE__LOAD_EXAMPLES": "False",
        "AIRFLOW_CONN_QUILLFEN_ALERTS": _conn_json(server.server_address[1]),
    }
    airflow = os.path.join(os.path.dirname(sys.executable), "airflow")
    subprocess.run([airflow, "db", "migrate"], env=env, check=True, capture_output=True, timeout=300)
    run = subprocess.run([sys.executable, str(dags / "quillfen_check_alerts.py")], env=env, capture_output=True,
                         text=True, timeout=300)
    assert len(received) == 1, run.stdout[-3000:] + run.stderr[-3000:]  # the passing task sends nothing
    body = received[0]["body"]
    assert body["experiment_id"] == "featured-rows" and body["worst"] == "error"
    assert body["text"].splitlines() == [
        "featured-rows 2026-03-02: 1 of 2 checks failed (worst: error)",
        "  sample_ratio [error] FAILED: observed 2.5e-05 vs threshold 0.001",
    ]
