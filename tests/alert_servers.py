"""Real servers on 127.0.0.1 that the alert tests deliver to (imported by the tests, not collected).

* :class:`HttpSink` -- ``http.server`` in a thread, standing in for a webhook and for Slack's
  incoming webhook: records every POST, answers with a set status.
* :class:`SmtpSink` -- an ``aiosmtpd`` SMTP server in a thread: records every message, refuses
  the recipients it is told to refuse (``550``).
* :class:`SilentPort` -- a listening socket that never accepts: a connection opens (the kernel's
  backlog) and nothing ever answers, so a client meets its own timeout.
"""

from __future__ import annotations

import email
import email.policy
import http.server
import json
import socket
import threading


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class HttpSink:
    """An HTTP server recording POSTs (``received``: path, headers, JSON body) and answering ``status``."""

    def __init__(self, status: int = 204) -> None:
        self.received: list[dict] = []
        sink = self

        class Handler(http.server.BaseHTTPRequestHandler):
            def do_POST(self):  # noqa: N802 (http.server API)
                raw = self.rfile.read(int(self.headers["Content-Length"]))
                sink.received.append({"path": self.path, "headers": dict(self.headers), "body": json.loads(raw)})
                reply = b"" if sink.status == 204 else (b"ok" if sink.status < 300 else b"refused by the test sink")
                self.send_response(sink.status)
                self.send_header("Content-Length", str(len(reply)))
                self.end_headers()
                self.wfile.write(reply)

            def log_message(self, *args):
                pass

        self.status = status
        self.server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.port = self.server.server_address[1]
        self.url = f"http://127.0.0.1:{self.port}"

    def __enter__(self) -> HttpSink:
        threading.Thread(target=self.server.serve_forever, daemon=True).start()
        return self

    def __exit__(self, *exc) -> None:
        self.server.shutdown()
        self.server.server_close()


class SmtpSink:
    """An aiosmtpd server recording messages (``messages``: envelope sender, recipients, parsed message)."""

    def __init__(self, refuse: tuple[str, ...] = ()) -> None:
        from aiosmtpd.controller import Controller

        self.messages: list[dict] = []
        self.refused: list[str] = []
        sink = self

        class Handler:
            async def handle_RCPT(self, server, session, envelope, address, rcpt_options):  # noqa: N802 (aiosmtpd API)
                if address in refuse:
                    sink.refused.append(address)
                    return "550 5.1.1 mailbox unavailable (test sink)"
                envelope.rcpt_tos.append(address)
                return "250 OK"

            async def handle_DATA(self, server, session, envelope):  # noqa: N802
                message = email.message_from_bytes(envelope.content, policy=email.policy.default)
                sink.messages.append({"from": envelope.mail_from, "to": list(envelope.rcpt_tos), "message": message})
                return "250 Message accepted for delivery"

        self.port = free_port()
        self.controller = Controller(Handler(), hostname="127.0.0.1", port=self.port)

    def __enter__(self) -> SmtpSink:
        self.controller.start()
        return self

    def __exit__(self, *exc) -> None:
        self.controller.stop()


class SilentPort:
    """A port that accepts connections into the backlog and never answers."""

    def __init__(self) -> None:
        self.socket = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        self.socket.bind(("127.0.0.1", 0))
        self.socket.listen(16)
        self.port = self.socket.getsockname()[1]
        self.url = f"http://127.0.0.1:{self.port}"

    def __enter__(self) -> SilentPort:
        return self

    def __exit__(self, *exc) -> None:
        self.socket.close()


def http_conn(url: str, **extra) -> str:
    """``AIRFLOW_CONN_...`` JSON of an HTTP connection to ``url`` (extra keys: headers, ``timeout``)."""
    host, port = url.removeprefix("http://").rsplit(":", 1)
    return json.dumps({"conn_type": "http", "host": host, "port": int(port), "schema": "http", "extra": extra})


def slack_conn(url: str, token: str = "quillfen/checks-room", **extra) -> str:
    """A ``slackwebhook`` connection posting to ``url/<token>`` (Slack's own host replaced by ``url``)."""
    return json.dumps({"conn_type": "slackwebhook", "host": url, "password": token, "extra": extra})


def smtp_conn(port: int, **extra) -> str:
    """A plain (no TLS) SMTP connection to 127.0.0.1:``port`` from the invented checks mailbox."""
    extra = {"from_email": "checks@quillfen.example", "to": ["pricing-desk@quillfen.example"], "disable_ssl": True,
             "disable_tls": True, **extra}
    return json.dumps({"conn_type": "smtp", "host": "127.0.0.1", "port": port, "extra": extra})
