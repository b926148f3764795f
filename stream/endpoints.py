"""The HTTP endpoints: ``/metrics`` (Prometheus exposition), ``/healthz``, ``/readyz``.

Nothing else is served: every other path is 404 and every method but GET/HEAD is 405.
The server runs in a daemon thread; the default address is loopback only
(:data:`DEFAULT_LISTEN`), so exposing it is a deliberate configuration choice.
"""

from __future__ import annotations

import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Callable

from prometheus_client import CONTENT_TYPE_LATEST

DEFAULT_LISTEN = "127.0.0.1:9471"


def parse_listen(text: str) -> tuple[str, int]:
    """``HOST:PORT`` (``[v6]:PORT`` for IPv6) -> (host, port); ValueError with a one-line message."""
    host, sep, port = text.rpartition(":")
    if not sep or not port.isdigit() or not 0 <= int(port) <= 65535:
        raise ValueError(f"listen address must be HOST:PORT with a port in 0..65535, got {text!r}")
    return host.strip("[]") or "127.0.0.1", int(port)


class Endpoints:
    """Serves the exposition from ``metrics()`` and readiness from ``ready()``."""

    def __init__(self, listen: str, metrics: Callable[[], bytes], ready: Callable[[], bool]) -> None:
        host, port = parse_listen(listen)
        handler = _handler(metrics, ready)
        self.server = ThreadingHTTPServer((host, port), handler)
        self.server.daemon_threads = True
        self.thread = threading.Thread(target=self.server.serve_forever, name="shiftsieve-http", daemon=True)

    @property
    def address(self) -> str:
        host, port = self.server.server_address[:2]
        return f"{host}:{port}"

    def start(self) -> "Endpoints":
        self.thread.start()
        return self

    def stop(self) -> None:
        self.server.shutdown()
        self.server.server_close()


def _handler(metrics: Callable[[], bytes], ready: Callable[[], bool]) -> type[BaseHTTPRequestHandler]:
    class Handler(BaseHTTPRequestHandler):
        server_version = "shiftsieve"
        sys_version = ""

        def do_GET(self) -> None:  # noqa: N802 (http.server's naming)
            path = self.path.split("?", 1)[0]
            if path == "/metrics":
                self._reply(200, metrics(), CONTENT_TYPE_LATEST)
            elif path == "/healthz":
                self._reply(200, b"ok\n")
            elif path == "/readyz":
                ok = ready()
                self._reply(200 if ok else 503, b"ready\n" if ok else b"not ready\n")
            else:
                self._reply(404, b"not found\n")

        def do_HEAD(self) -> None:  # noqa: N802
            self.do_GET()

        def _refuse(self) -> None:
            self._reply(405, b"method not allowed\n")

        do_POST = do_PUT = do_DELETE = do_PATCH = _refuse

        def _reply(self, code: int, body: bytes, content_type: str = "text/plain; charset=utf-8") -> None:
            self.send_response(code)
            self.send_header("Content-Type", content_type)
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            if self.command != "HEAD":
                self.wfile.write(body)

        def log_message(self, format: str, *args) -> None:  # scrapes are not news
            pass

    return Handler
