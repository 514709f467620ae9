"""The metrics endpoint of one Seawall process: /metrics, /healthz, /readyz.

* ``/metrics`` is the injected registry in the Prometheus text format (or
  OpenMetrics when the scraper asks for it).
* ``/healthz`` answers 200 while the process can serve HTTP at all: a
  liveness probe that never depends on Redis, so a Redis outage does not get
  healthy workers restarted.
* ``/readyz`` answers 200 only when the readiness check passes (connected to
  Redis, with a model loaded) and 503 with the reason otherwise.

It binds loopback by default; exposing it is a deliberate ``metrics.host``.
"""
from __future__ import annotations

import logging
import threading
from collections.abc import Callable
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

from prometheus_client import CollectorRegistry
from redis.exceptions import RedisError
from prometheus_client.exposition import choose_encoder

log = logging.getLogger("seawall.metrics")

ReadyCheck = Callable[[], tuple[bool, str]]


def _always_ready() -> tuple[bool, str]:
    return True, "ok"


class MetricsServer:
    """A small threaded HTTP server for one process's registry.

    Parameters
    ----------
    registry : the process's CollectorRegistry.
    host, port : where to listen; port 0 picks a free port (see :attr:`port`
        after :meth:`start`).
    ready : returns ``(ready, reason)``; called on every /readyz.
    """

    def __init__(self, *, registry: CollectorRegistry, host: str = "127.0.0.1", port: int = 9310,
                 ready: ReadyCheck = _always_ready):
        if not isinstance(registry, CollectorRegistry):
            raise ValueError(f"MetricsServer: registry must be a CollectorRegistry, got {type(registry).__name__}")
        if not isinstance(port, int) or not 0 <= port <= 65535:
            raise ValueError(f"MetricsServer: port must be 0..65535, got {port!r}")
        if not isinstance(host, str) or not host:
            raise ValueError(f"MetricsServer: host must be a non-empty string, got {host!r}")
        self.registry = registry
        self.host = host
        self.requested_port = port
        self.ready = ready
        self._httpd: ThreadingHTTPServer | None = None
        self._thread: threading.Thread | None = None

    @property
    def port(self) -> int:
        if self._httpd is None:
            raise RuntimeError("MetricsServer.port: the server is not started")
        return self._httpd.server_address[1]

    @property
    def url(self) -> str:
        return f"http://{self.host}:{self.port}"

    def start(self) -> "MetricsServer":
        handler = _handler(self.registry, self.ready)
        try:
            self._httpd = ThreadingHTTPServer((self.host, self.requested_port), handler)
        except OSError as exc:
            from model.errors import SeawallError

            raise SeawallError(
                f"metrics server: cannot listen on {self.host}:{self.requested_port} ({exc.strerror}); "
                "choose another --metrics-port, or 0 to turn the endpoint off"
            ) from None
        self._httpd.daemon_threads = True
        self._thread = threading.Thread(target=self._httpd.serve_forever, name="seawall-metrics", daemon=True)
        self._thread.start()
        log.info("metrics endpoint on http://%s:%d/metrics", self.host, self.port)
        return self

    def stop(self) -> None:
        if self._httpd is None:
            return
        self._httpd.shutdown()
        self._httpd.server_close()
        if self._thread is not None:
            self._thread.join(timeout=5)
        self._httpd = None
        self._thread = None

    def __enter__(self) -> "MetricsServer":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()


def _handler(registry: CollectorRegistry, ready: ReadyCheck):
    class Handler(BaseHTTPRequestHandler):
        server_version = "seawall-metrics"

        def do_GET(self):  # noqa: N802 (http.server's naming)
            path = self.path.split("?", 1)[0]
            if path == "/metrics":
                encoder, content_type = choose_encoder(self.headers.get("Accept", ""))
                self._reply(200, encoder(registry), content_type)
            elif path == "/healthz":
                self._reply(200, b"ok\n")
            elif path == "/readyz":
                try:
                    ok, reason = ready()
                except Exception as exc:  # a failing check means "not ready", never a 500 crash
                    ok, reason = False, f"readiness check failed: {type(exc).__name__}"
                self._reply(200 if ok else 503, (reason.rstrip() + "\n").encode())
            else:
                self._reply(404, b"not found: try /metrics, /healthz or /readyz\n")

        def _reply(self, code: int, body: bytes, content_type: str = "text/plain; charset=utf-8") -> None:
            self.send_response(code)
            self.send_header("Content-Type", content_type)
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)

        def log_message(self, fmt, *args):  # scrapes every few seconds: keep them out of the log
            log.debug("metrics http: " + fmt, *args)

    return Handler


def redis_model_ready(client, model_loaded: Callable[[], bool]) -> ReadyCheck:
    """Readiness: Redis answers PING and a model is loaded."""

    def check() -> tuple[bool, str]:
        if not model_loaded():
            return False, "not ready: no model loaded"
        try:
            client.ping()
        except (RedisError, OSError) as exc:
            return False, f"not ready: Redis unreachable ({type(exc).__name__})"
        return True, "ready"

    return check
