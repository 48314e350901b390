"""The HTTP endpoint: ``/metrics`` (Prometheus exposition), ``/healthz``, ``/readyz``.

``/healthz`` answers 200 while the processing loop has beaten within the last
``stall_seconds``; ``/readyz`` answers 200 once state is restored and the input is
open. Served from a daemon thread; it only reads the runtime's counters.
"""

from __future__ import annotations

import threading
import time
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

from prometheus_client import CONTENT_TYPE_LATEST, CollectorRegistry, generate_latest

from service.stats import RuntimeStats

__all__ = ["MetricsServer", "parse_listen"]


def parse_listen(listen: str) -> tuple[str, int]:
    """Split ``host:port`` (IPv6 hosts in brackets).

    >>> parse_listen("127.0.0.1:9464"), parse_listen("[::1]:0")
    (('127.0.0.1', 9464), ('::1', 0))
    """
    host, sep, port = listen.rpartition(":")
    if not sep or not port.isdigit():
        raise ValueError(f"listen address {listen!r} must be host:port")
    return host.strip("[]"), int(port)


class MetricsServer:
    """Serve the endpoints in a background thread until :meth:`stop`."""

    def __init__(self, listen: str, registry: CollectorRegistry, stats: RuntimeStats, stall_seconds: float = 120.0) -> None:
        host, port = parse_listen(listen)
        outer = self

        class Handler(BaseHTTPRequestHandler):
            def do_GET(self) -> None:  # noqa: N802 (http.server's name)
                path = self.path.split("?", 1)[0]
                if path == "/metrics":
                    body, ctype, code = generate_latest(registry), CONTENT_TYPE_LATEST, 200
                elif path == "/healthz":
                    stalled = time.monotonic() - stats.heartbeat > outer.stall_seconds
                    code = 503 if stalled else 200
                    body, ctype = (b"stalled\n" if stalled else b"ok\n"), "text/plain; charset=utf-8"
                elif path == "/readyz":
                    code = 200 if stats.ready else 503
                    body, ctype = (b"ready\n" if stats.ready else b"not ready\n"), "text/plain; charset=utf-8"
                else:
                    body, ctype, code = b"not found\n", "text/plain; charset=utf-8", 404
                self.send_response(code)
                self.send_header("Content-Type", ctype)
                self.send_header("Content-Length", str(len(body)))
                self.end_headers()
                self.wfile.write(body)

            def log_message(self, format: str, *args: object) -> None:  # noqa: A002
                return  # scrapes every few seconds would flood the log

        self.stall_seconds = stall_seconds
        self.httpd = ThreadingHTTPServer((host, port), Handler)
        self.httpd.daemon_threads = True
        self.thread = threading.Thread(target=self.httpd.serve_forever, name="tidewatch-http", daemon=True)

    @property
    def address(self) -> tuple[str, int]:
        return self.httpd.server_address[:2]  # type: ignore[return-value]

    def start(self) -> "MetricsServer":
        self.thread.start()
        return self

    def stop(self) -> None:
        self.httpd.shutdown()
        self.httpd.server_close()
