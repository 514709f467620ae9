"""Observability of one ``seawall serve`` process: metrics endpoint, wave detector, shared gauges.

:func:`start_observability` builds, from the one Config, what a serving
process runs beside its consumer:

* a :class:`ops.metrics.PrometheusObserver` on a fresh registry, for the worker;
* the HTTP endpoint (``metrics.host``:``metrics.port``; port 0 turns it off);
* a :class:`Monitor` thread that every ``metrics.poll_s`` seconds advances the
  shared wave detector, ends idle campaigns, and refreshes the gauges whose
  truth lives in Redis (active waves and campaigns, the last retrain, feedback).

It only observes: the campaign policy, which changes verdicts, is built with the
worker in :mod:`ops.serving`.

The gauges read from Redis are the same on every process; dashboards and
alert rules aggregate them with ``max``.
"""
from __future__ import annotations

import logging
import threading
import time
from dataclasses import dataclass

from prometheus_client import CollectorRegistry
from redis.exceptions import RedisError

from model.params import integer, positive, set_params
from ops.cusum import WaveParams
from ops.httpserver import MetricsServer, redis_model_ready
from ops.metrics import OTHER, RETRAIN_OUTCOMES, PrometheusObserver
from ops.waves import WaveDetector, read_active
from worker.campaignstore import end_idle_campaigns, read_campaigns
from worker.events import parse_event, read_events

log = logging.getLogger("seawall.monitor")

# Reconnect backoff of the monitor thread after a Redis error (capped exponential).
BACKOFF_BASE_S = 0.5
BACKOFF_FACTOR = 2.0
BACKOFF_CAP_S = 30.0
TAIL_COUNT = 1000
RETRAIN_LOOKBACK = 1000


def retrain_outcome(data: dict) -> str:
    """The outcome of a ``retrain`` event: promoted, refused, failed, skipped or other."""
    if data.get("error") or data.get("failed"):
        return "failed"
    decision = data.get("decision", data.get("outcome", ""))
    return decision if decision in RETRAIN_OUTCOMES else OTHER


_PARAMS = {"campaign_window_s": integer(1), "poll_s": positive()}


class Monitor:
    """The periodic control-plane pass of one process (see the module doc).

    Parameters
    ----------
    client : a Redis client (replies as bytes or str).
    keys : key names.
    observer : where gauges and counters go.
    detector : the wave detector, or ``None`` when waves are off.
    campaign_window_s : campaigns idle this long end.
    poll_s : seconds between passes.
    """

    def __init__(self, *, client, keys, observer: PrometheusObserver, detector: WaveDetector | None = None,
                 campaign_window_s: int = 600, poll_s: float = 5.0, clock=time.time):
        set_params(self, _PARAMS, locals())
        self.client = client
        self.keys = keys
        self.observer = observer
        self.detector = detector
        self.clock = clock
        self._cursors: dict[str, str] | None = None
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def refresh(self) -> None:
        """One pass; Redis errors propagate to the caller."""
        if self._cursors is None:
            self._cursors = self._start_cursors()
        if self.detector is not None:
            self.detector.tick()
            end_idle_campaigns(self.client, self.keys, now=self.clock(), window_s=self.campaign_window_s)
        self._tail_events()
        self._tail_feedback()
        self.observer.set_waves(read_active(self.client, self.keys))
        self.observer.set_campaigns(len(read_campaigns(self.client, self.keys)))
        self.observer.set_ready(self.observer.model_loaded)  # this pass reached Redis

    def _start_cursors(self) -> dict[str, str]:
        """Count only what arrives from now on; but show the last retrain's outcome at once."""
        cursors = {}
        for name, stream in (("events", self.keys.events), ("feedback", self.keys.feedback)):
            last = self.client.xrevrange(stream, count=1)
            cursors[name] = _text(last[0][0]) if last else "0-0"
        for event in read_events(self.client, self.keys.events, newest_first=True, count=RETRAIN_LOOKBACK):
            if event.type == "retrain":
                self.observer.on_retrain(retrain_outcome(event.data), ts=event.ts, count=False)
                break
        return cursors

    def _tail(self, name: str, stream: str):
        while True:
            batch = self.client.xrange(stream, min="(" + self._cursors[name], count=TAIL_COUNT)
            if not batch:
                return
            self._cursors[name] = _text(batch[-1][0])
            yield from batch
            if len(batch) < TAIL_COUNT:
                return

    def _tail_events(self) -> None:
        for stream_id, fields in self._tail("events", self.keys.events):
            event = parse_event(stream_id, fields)
            if event is not None and event.type == "retrain":
                self.observer.on_retrain(retrain_outcome(event.data), ts=event.ts)

    def _tail_feedback(self) -> None:
        for _stream_id, fields in self._tail("feedback", self.keys.feedback):
            label = fields.get(b"label", fields.get("label"))
            self.observer.on_feedback(label)

    def start(self) -> "Monitor":
        self._thread = threading.Thread(target=self._run, name="seawall-monitor", daemon=True)
        self._thread.start()
        return self

    def stop(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=10)

    def _run(self) -> None:
        delay = 0.0
        while not self._stop.wait(delay):
            try:
                self.refresh()
                delay = self.poll_s
            except (RedisError, OSError) as exc:
                self.observer.set_ready(False)
                delay = min(BACKOFF_CAP_S, max(BACKOFF_BASE_S, delay * BACKOFF_FACTOR))
                log.warning("monitor: Redis error (%s); retrying in %.1fs", type(exc).__name__, delay)


@dataclass
class Observability:
    """What :func:`start_observability` started; :meth:`stop` undoes it."""

    registry: CollectorRegistry
    observer: PrometheusObserver
    server: MetricsServer | None = None
    monitor: Monitor | None = None

    def stop(self) -> None:
        if self.monitor is not None:
            self.monitor.stop()
        if self.server is not None:
            self.server.stop()


def start_observability(config, *, client=None, registry: CollectorRegistry | None = None) -> Observability:
    """Build and start the observer, endpoint and monitor of one serving process."""
    from ops.connection import connect

    registry = registry if registry is not None else CollectorRegistry()
    observer = PrometheusObserver.for_config(config, registry)
    client = client if client is not None else connect(config, socket_timeout=5.0, client_name="seawall-monitor")
    out = Observability(registry=registry, observer=observer)
    detector = None
    if config.waves.enabled:
        detector = WaveDetector(client=client, keys=config.keys, params=WaveParams.from_settings(config.waves),
                                sites=config.metrics.sites)

    def ready():
        ok, reason = redis_model_ready(client, lambda: observer.model_loaded)()
        observer.set_ready(ok)
        return ok, reason

    if config.metrics.port:
        out.server = MetricsServer(registry=registry, host=config.metrics.host, port=config.metrics.port,
                                   ready=ready).start()
    out.monitor = Monitor(client=client, keys=config.keys, observer=observer, detector=detector,
                          campaign_window_s=config.waves.campaign_window_s, poll_s=config.metrics.poll_s).start()
    return out


def _text(value) -> str:
    return value.decode("utf-8", "replace") if isinstance(value, bytes) else str(value)
