"""Real alert receivers for tests: a JSON webhook server on 127.0.0.1 in a thread, and a closed port.

The URLs carry a token in the path and a key in the query, as real webhook URLs do, so tests can check
that neither reaches the history, the logs or the console.
"""

from __future__ import annotations

import socket
import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

TOKEN = "s3cr3t-T0KEN-7f2a"
QUERY_KEY = "k3y-9bd1"
ENV_NAME = "TAREWISE_WEBHOOK_URL"   # alerts.webhook_url_env's default


class Receiver:
    """A JSON webhook receiver: records every request; answers with ``status``."""

    def __init__(self, status: int = 200):
        self.status = status
        self.requests: list[dict] = []
        receiver = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self):  # noqa: N802 - http.server naming
                length = int(self.headers.get("Content-Length") or 0)
                body = self.rfile.read(length)
                receiver.requests.append({"path": self.path, "body": body,
                                          "content_type": self.headers.get("Content-Type")})
                self.send_response(receiver.status)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, *args):  # the receiver's own access log is not ours to test
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.thread = threading.Thread(target=self.server.serve_forever, daemon=True)

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.server.server_address[1]}/hooks/{TOKEN}?key={QUERY_KEY}"

    def __enter__(self) -> "Receiver":
        self.thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self.server.shutdown()
        self.server.server_close()


def closed_port_url() -> str:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    return f"http://127.0.0.1:{port}/hooks/{TOKEN}?key={QUERY_KEY}"


def no_secret(text: str) -> None:
    assert TOKEN not in text and QUERY_KEY not in text
