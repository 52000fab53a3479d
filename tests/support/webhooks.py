"""Test helpers for webhooks: an HTTP receiver on a loopback port and a stub resolver."""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Callable
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any


class Receiver:
    """An HTTP server on a free loopback port answering POSTs with the statuses given, in
    order, then with default; it keeps (time, headers, JSON body) of every request."""

    def __init__(
        self, statuses: list[int], default: int = 200, headers: dict[str, str] | None = None
    ) -> None:
        extra = dict(headers or {})
        self.requests: list[tuple[float, dict[str, str], Any]] = []
        self.raw_bodies: list[bytes]
        answers = list(statuses)
        received = self.requests

        raw = self.raw_bodies = []

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:  # noqa: N802 - http.server's name
                body = self.rfile.read(int(self.headers.get("Content-Length", 0)))
                raw.append(body)
                received.append((time.monotonic(), dict(self.headers), json.loads(body)))
                self.send_response(answers.pop(0) if answers else default)
                self.send_header("Content-Length", "2")
                for name, value in extra.items():
                    self.send_header(name, value)
                self.end_headers()
                self.wfile.write(b"{}")

            def log_message(self, *args: Any) -> None:
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}/hook"
        self.thread = threading.Thread(
            target=self.server.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True
        )
        self.thread.start()

    def close(self) -> None:
        self.server.shutdown()
        self.server.server_close()
        self.thread.join(5)


def stub(*addresses: str) -> Callable[[str, int], list[str]]:
    """A resolver answering every name with addresses (no DNS traffic)."""

    def resolve(host: str, port: int) -> list[str]:
        return list(addresses)

    return resolve
