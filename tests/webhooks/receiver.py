"""A small HTTP receiver for webhook tests: http.server in a thread on 127.0.0.1 (a free
port), checking each body's signature with the standard library's hmac on its own."""

from __future__ import annotations

import hashlib
import hmac
import json
import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any


class Receiver:
    """Records every POST (its JSON body, delivery header and whether its signature is
    right); answers ``status``. ``stop()`` and ``start()`` take it down and back on the same port."""

    def __init__(self, secret: str) -> None:
        self.secret = secret.encode()
        self.status = 200
        self.received: list[dict[str, Any]] = []
        self.port = 0
        self.server: ThreadingHTTPServer | None = None
        self.start()

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}/hook"

    def start(self) -> None:
        owner = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:  # noqa: N802 (http.server's name)
                raw = self.rfile.read(int(self.headers["Content-Length"]))
                # RFC 2104 HMAC with SHA-256, worked by the standard library
                good = "sha256=" + hmac.new(owner.secret, raw, hashlib.sha256).hexdigest()
                owner.received.append({"body": json.loads(raw),
                                       "signed": hmac.compare_digest(good, self.headers["X-Curvekeeper-Signature"]),
                                       "delivery": self.headers["X-Curvekeeper-Delivery"],
                                       "host": self.headers["Host"]})
                self.send_response(owner.status)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, *args: Any) -> None:
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", self.port), Handler)
        self.port = self.server.server_address[1]
        threading.Thread(target=self.server.serve_forever, daemon=True).start()

    def stop(self) -> None:
        assert self.server is not None
        self.server.shutdown()
        self.server.server_close()
        self.server = None

    def events(self) -> list[dict[str, Any]]:
        return [r["body"]["event"] for r in self.received]
