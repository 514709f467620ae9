"""Wiring a stream worker from the one Config: client, model source, observer, consumer.

``seawall serve`` and the benchmarks build their consumers here, so both run
the same code.  Two hooks for other parts of ops:

* :func:`model_source` picks where the model comes from: the ``--model`` file
  when one is named, else the registry's active model (``ops.registry.RegistryModelSource``).
* :func:`build_observer` is where the metrics observer (and its HTTP server)
  plug in; until then the worker reports to a :class:`worker.observer.NullObserver`.
"""
from __future__ import annotations

import importlib
import importlib.util
import logging
import time

import redis

from ops.config import Config, ConfigError
from worker.connection import connect
from worker.consumer import StreamConsumer
from worker.loader import FileModelSource, ModelSource
from worker.observer import NullObserver, WorkerObserver

log = logging.getLogger("seawall.serve")


def redis_client(config: Config, *, blocking_ms: int = 0, client_name: str = "", raw_streams: bool = True):
    """A worker client for ``config.redis_url`` whose socket timeout outlasts a blocking read."""
    return connect(
        config.redis_url,
        tls_ca=config.redis_tls_ca,
        tls_cert=config.redis_tls_cert,
        tls_key=config.redis_tls_key,
        socket_timeout=config.worker.socket_timeout_s + blocking_ms / 1000.0,
        client_name=client_name,
        raw_streams=raw_streams,
    )


def model_source(config: Config) -> ModelSource:
    """The model file when ``model_path`` is set, else the registry's active model."""
    if config.model_path:
        return FileModelSource(path=config.model_path)
    if importlib.util.find_spec("ops.registry") is not None:
        registry = importlib.import_module("ops.registry")
        source_class = getattr(registry, "RegistryModelSource", None)
        if source_class is not None:
            client = redis_client(config, client_name="seawall-models", raw_streams=False)
            source = source_class(client=client, keys=config.keys, poll_interval_s=config.worker.reload_poll_s)
            return WaitForRedis(source=source, settings=config.worker)
    raise ConfigError("serve: no model to serve; pass --model FILE or set SEAWALL_MODEL_PATH")


class WaitForRedis:
    """A model source whose first load needs Redis: it waits for the server instead of failing.

    A worker started before its Redis (a host boot, a compose file without
    ordering) must not crash: the first ``current()`` retries lost or refused
    connections with the worker's capped exponential backoff and logs each
    wait.  Everything else is the wrapped source's.
    """

    def __init__(self, *, source: ModelSource, settings, sleep=time.sleep):
        self.source = source
        self.settings = settings
        self.sleep = sleep

    def current(self):
        s = self.settings
        failures = 0
        while True:
            try:
                return self.source.current()
            except (redis.ConnectionError, redis.TimeoutError) as exc:
                failures += 1
                delay = min(s.backoff_cap_s, s.backoff_base_s * s.backoff_factor ** (failures - 1))
                log.warning("waiting for Redis to load the active model (%s: %s); retrying in %.2fs (attempt %d)",
                            type(exc).__name__, exc, delay, failures)
                self.sleep(delay)

    def poll(self):
        return self.source.poll()

    def __getattr__(self, name):
        return getattr(self.source, name)


def build_observer(config: Config) -> WorkerObserver:
    """The observer a worker reports to (metrics plug in here)."""
    return NullObserver()


def build_consumer(
    config: Config,
    *,
    source: ModelSource | None = None,
    observer: WorkerObserver | None = None,
    policies=(),
    consumer: str = "",
) -> StreamConsumer:
    name = consumer or config.worker.consumer
    client = redis_client(config, blocking_ms=config.worker.block_ms, client_name="seawall-worker")
    return StreamConsumer(
        client=client,
        keys=config.keys,
        settings=config.worker,
        model_source=source if source is not None else model_source(config),
        consumer=name,
        observer=observer if observer is not None else build_observer(config),
        policies=policies,
    )


def configure_logging(level: str, *, tag: str = "") -> None:
    """One log line per event, to stderr; comment text is never logged."""
    name = str(level).upper()
    if name not in ("DEBUG", "INFO", "WARNING", "ERROR"):
        raise ConfigError(f"config: log_level must be DEBUG, INFO, WARNING or ERROR, got {level!r}")
    fmt = "%(asctime)s %(levelname)s %(name)s" + (f" [{tag}]" if tag else "") + ": %(message)s"
    logging.basicConfig(level=getattr(logging, name), format=fmt, force=True)
