"""The composition root: a worker wired from the one Config.

``seawall serve``, the demo and the benchmarks build their consumers with
:func:`build_consumer`, so all of them run the same code:

* the transport: Redis Streams (:mod:`worker.redistransport`) unless
  ``amqp.url`` (``serve --source amqp://...``) names a RabbitMQ broker
  (:mod:`worker.amqp`); Redis keeps the state either way;
* the batch policies that change verdicts (:func:`campaign_policy` when
  ``[waves]`` turns campaigns on);
* :func:`model_source`: the ``--model`` file when one is named, else the
  registry's active model (``ops.registry.RegistryModelSource``);
* the observer: metrics plug in through ``observer=`` (``ops.monitor`` only
  observes); without one the worker reports to a :class:`worker.observer.NullObserver`.
"""
from __future__ import annotations

import importlib
import importlib.util
import logging
import time

import redis

from ops.config import Config, ConfigError
from worker.connection import connect
from worker.consumer import StreamConsumer, default_consumer_name
from worker.loader import FileModelSource, ModelSource
from worker.observer import NullObserver, WorkerObserver
from worker.transport import TransientError

log = logging.getLogger("seawall.serve")


def redis_client(config: Config, *, blocking_ms: int = 0, client_name: str = "", raw_streams: bool = True,
                 sleep=time.sleep):
    """A worker client for ``config.redis_url`` whose socket timeout outlasts a blocking read.

    A plain client connects on its first command; redis-py's cluster client
    asks the node for the slot map as it is built, so with ``redis.cluster``
    this waits for the cluster (capped exponential backoff, one log line per
    wait) rather than failing a worker started before it.
    """
    def build():
        return connect(
            config.redis_url,
            tls_ca=config.redis_tls_ca,
            tls_cert=config.redis_tls_cert,
            tls_key=config.redis_tls_key,
            socket_timeout=config.worker.socket_timeout_s + blocking_ms / 1000.0,
            client_name=client_name,
            raw_streams=raw_streams,
            cluster=config.redis.cluster,
        )

    if not config.redis.cluster:
        return build()
    s = config.worker
    failures = 0
    while True:
        try:
            return build()
        except (redis.ConnectionError, redis.TimeoutError, redis.exceptions.ClusterError,
                redis.exceptions.RedisClusterException) as exc:
            failures += 1
            delay = min(s.backoff_cap_s, s.backoff_base_s * s.backoff_factor ** (failures - 1))
            log.warning("waiting for the Redis Cluster (%s: %s); retrying in %.2fs (attempt %d)",
                        type(exc).__name__, exc, delay, failures)
            sleep(delay)


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
        # A reload that meets a lost connection is retried by the worker loop, like a read.
        try:
            return self.source.poll()
        except (redis.ConnectionError, redis.TimeoutError) as exc:
            raise TransientError("lost connection to Redis") from exc

    def __getattr__(self, name):
        return getattr(self.source, name)


def build_observer(config: Config) -> WorkerObserver:
    """The observer a worker reports to (metrics plug in here)."""
    return NullObserver()


def campaign_policy(config: Config, *, clock=time.time):
    """The campaign policy of ``[waves]``, as ``seawall serve``, the demo and the benchmarks run it."""
    from model.minhash import MinHasher
    from worker.campaigns import CampaignPolicy

    w = config.waves
    return CampaignPolicy(
        hasher=MinHasher(num_perm=w.campaign_perm, shingle=w.campaign_shingle),
        bands=w.campaign_bands, min_size=w.campaign_min_size, min_authors=w.campaign_min_authors,
        window_s=w.campaign_window_s, min_words=w.campaign_min_words, hold=w.campaign_hold,
        baseline_days=w.campaign_baseline_days, burst_ratio=w.campaign_burst_ratio, peak_ratio=w.campaign_peak_ratio,
        signals=w.campaign_signals,
        new_author_s=w.campaign_new_author_s, warmup_s=w.campaign_warmup_s, new_author_share=w.campaign_new_author_share,
        lean_share=w.campaign_lean_share, lean_quantile=w.campaign_lean_quantile, clock=clock,
    )


def default_policies(config: Config, *, clock=time.time) -> tuple:
    """The batch policies ``[waves]`` turns on (today: the campaign policy)."""
    if config.waves.enabled and config.waves.campaigns:
        return (campaign_policy(config, clock=clock),)
    return ()


def build_consumer(
    config: Config,
    *,
    source: ModelSource | None = None,
    observer: WorkerObserver | None = None,
    policies=None,
    consumer: str = "",
    client=None,
    clock=time.time,
) -> StreamConsumer:
    """One worker from the Config.

    ``policies=None`` builds :func:`default_policies`; ``client`` (a raw-stream
    Redis client, e.g. a fakeredis one in the demo) replaces the one built
    from ``redis_url``.  Whatever the comment transport, Redis keeps the
    policies' state: one :class:`worker.redistransport.RedisState` on ``client``
    (campaign buckets, links and members through its campaign store).
    """
    from worker.redistransport import RedisState

    name = consumer or config.worker.consumer or default_consumer_name()
    if client is None:
        client = redis_client(config, blocking_ms=config.worker.block_ms, client_name="seawall-worker")
    common = dict(
        state=RedisState(client, config.keys),
        keys=config.keys,
        settings=config.worker,
        model_source=source if source is not None else model_source(config),
        observer=observer if observer is not None else build_observer(config),
        policies=default_policies(config, clock=clock) if policies is None else policies,
        clock=clock,
    )
    if config.amqp.url:
        from worker.amqp import amqp_consumer

        return amqp_consumer(client=client, amqp=config.amqp, consumer=name, **common)
    from worker.redistransport import redis_consumer

    return redis_consumer(client=client, consumer=name, **common)


def configure_logging(level: str, *, tag: str = "") -> None:
    """One log line per event, to stderr; comment text is never logged."""
    name = str(level).upper()
    if name not in ("DEBUG", "INFO", "WARNING", "ERROR"):
        raise ConfigError(f"config: log_level must be DEBUG, INFO, WARNING or ERROR, got {level!r}")
    fmt = "%(asctime)s %(levelname)s %(name)s" + (f" [{tag}]" if tag else "") + ": %(message)s"
    logging.basicConfig(level=getattr(logging, name), format=fmt, force=True)
    # pika reports every connection step at INFO and frames at DEBUG (message bodies are comments): its own
    # warnings and errors are kept, and Seawall logs one line of its own when it starts consuming.
    logging.getLogger("pika").setLevel(logging.WARNING)
