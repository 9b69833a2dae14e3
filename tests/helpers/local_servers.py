"""Real servers on loopback for the alert-delivery tests: an SMTP inbox (aiosmtpd) and
an HTTP webhook receiver (the standard library's ThreadingHTTPServer)."""

from __future__ import annotations

import json
import socket
import threading
import time
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

from aiosmtpd.smtp import AuthResult


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class SmtpInbox:
    """aiosmtpd handler keeping every message (sender, recipients, bytes) and login."""

    def __init__(self):
        self.messages: list[tuple[str, list[str], bytes]] = []
        self.logins: list[tuple[bytes, bytes]] = []

    async def handle_DATA(self, server, session, envelope):  # noqa: N802 (aiosmtpd hook)
        self.messages.append((envelope.mail_from, list(envelope.rcpt_tos), envelope.content))
        return "250 OK"

    def authenticate(self, server, session, envelope, mechanism, auth_data):
        self.logins.append((auth_data.login, auth_data.password))
        ok = auth_data.login == b"alerts" and auth_data.password == b"s3cret"
        # handled=False: let aiosmtpd answer 535 itself (it stays silent otherwise).
        return AuthResult(success=ok, handled=False)


class WebhookReceiver:
    """A local webhook receiver: answers a scripted list of (status, delay_s) first,
    then ``status`` (changeable) to every POST.  ``requests`` holds (headers, body) per
    POST and ``answered`` the status given to each."""

    def __init__(self, status: int = 200, script: list[tuple[int, float]] | None = None):
        self.status = status
        self.script = list(script or [])
        self.requests: list[tuple[dict, bytes]] = []
        self.answered: list[int] = []
        receiver = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self):  # noqa: N802 (http.server hook)
                body = self.rfile.read(int(self.headers["Content-Length"]))
                status, delay = receiver.script.pop(0) if receiver.script else (receiver.status, 0)
                receiver.requests.append((dict(self.headers), body))
                receiver.answered.append(status)
                time.sleep(delay)
                try:
                    self.send_response(status)
                    self.end_headers()
                    self.wfile.write(b"ok" if status < 300 else b"unavailable")
                except OSError:
                    pass  # the client gave up (time-out test)

            def log_message(self, *args):
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.server.daemon_threads = True
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}/hook"
        self.thread = threading.Thread(target=self.server.serve_forever, args=(0.05,), daemon=True)

    def __enter__(self):
        self.thread.start()
        return self

    def __exit__(self, *exc):
        self.server.shutdown()
        self.server.server_close()

    def delivered(self) -> list[dict]:
        """The JSON bodies of the POSTs answered with success."""
        return [
            json.loads(body)
            for (_, body), status in zip(self.requests, self.answered, strict=True)
            if status < 300
        ]
