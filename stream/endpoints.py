"""The HTTP endpoints: ``/metrics`` (Prometheus exposition), ``/healthz``, ``/readyz``.

Nothing else is served: every other path is 404 and every other standard method is 405
(unknown methods 501); a query string is ignored. The server runs in a daemon thread, one thread
per connection, each with a socket timeout (:data:`REQUEST_TIMEOUT_S`); the default address is
loopback only (:data:`DEFAULT_LISTEN`), so exposing it is a deliberate configuration choice.
"""

from __future__ import annotations

import socket
import sys
import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Callable

from prometheus_client import exposition

#: ``generate_latest`` writes the classic text format, which Prometheus' exposition-format spec types
#: ``text/plain; version=0.0.4``; prometheus_client >= 0.22 made CONTENT_TYPE_LATEST the 1.0.0 one
#: and itself serves generate_latest's output as 0.0.4 unless the scraper asks for 1.0.0.
METRICS_CONTENT_TYPE = getattr(exposition, "CONTENT_TYPE_PLAIN_0_0_4", exposition.CONTENT_TYPE_LATEST)
#: a connection that sends no complete request within this long is closed (slow or idle clients
#: would otherwise each hold a thread for ever)
REQUEST_TIMEOUT_S = 10.0

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
        # ThreadingHTTPServer binds AF_INET: an IPv6 literal ([::1]:PORT, which parse_listen accepts)
        # needs an AF_INET6 server
        server_class = _Server6 if ":" in host else _Server
        self.server = server_class((host, port), handler)
        self.server.daemon_threads = True
        self.thread = threading.Thread(target=self.server.serve_forever, name="shiftsieve-http", daemon=True)

    @property
    def address(self) -> str:
        host, port = self.server.server_address[:2]
        return f"[{host}]:{port}" if ":" in host else f"{host}:{port}"

    def start(self) -> "Endpoints":
        self.thread.start()
        return self

    def stop(self) -> None:
        if self.thread.is_alive():   # shutdown() waits for serve_forever: it would hang if never started
            self.server.shutdown()
        self.server.server_close()


class _Server(ThreadingHTTPServer):
    # socketserver's listen backlog is 5: a burst of connections (probes, scrapers, a port scan)
    # beyond it has its SYNs dropped and every client waits the 1 s SYN retransmission
    request_queue_size = 128

    def handle_error(self, request, client_address) -> None:
        # a client that went away or timed out mid-response (a scrape timeout, a port scan) is not
        # worth a traceback on stderr; anything else still gets socketserver's report
        if isinstance(sys.exc_info()[1], OSError):
            return
        super().handle_error(request, client_address)


class _Server6(_Server):
    address_family = socket.AF_INET6


def _handler(metrics: Callable[[], bytes], ready: Callable[[], bool]) -> type[BaseHTTPRequestHandler]:
    class Handler(BaseHTTPRequestHandler):
        server_version = "shiftsieve"   # not BaseHTTP/0.6 Python/3.x.y
        sys_version = ""
        timeout = REQUEST_TIMEOUT_S     # socketserver.StreamRequestHandler sets it on the socket
        # errors http.server answers itself (400, 414 URI too long, 431 header too long/many, 501
        # unknown method): plain text, no HTML page
        error_content_type = "text/plain; charset=utf-8"
        error_message_format = "%(code)d %(message)s\n"

        def version_string(self) -> str:   # the default appends " " + sys_version
            return self.server_version

        def do_GET(self) -> None:  # noqa: N802 (http.server's naming)
            path = self.path.split("?", 1)[0]
            if path == "/metrics":
                self._reply(200, metrics(), METRICS_CONTENT_TYPE)
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
            # RFC 9110 15.5.6 405 Method Not Allowed: the response MUST carry Allow
            self._reply(405, b"method not allowed\n", allow="GET, HEAD")

        # the other methods of RFC 9110 section 9 (and PATCH, RFC 5789); anything else is 501
        do_POST = do_PUT = do_DELETE = do_PATCH = do_OPTIONS = do_TRACE = do_CONNECT = _refuse

        def _reply(self, code: int, body: bytes, content_type: str = "text/plain; charset=utf-8",
                   allow: str | None = None) -> None:
            self.send_response(code)
            if allow is not None:
                self.send_header("Allow", allow)
            self.send_header("Content-Type", content_type)
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            if self.command != "HEAD":
                self.wfile.write(body)

        def log_message(self, format: str, *args) -> None:  # scrapes are not news
            pass

    return Handler
