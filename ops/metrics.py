"""Seawall's Prometheus metrics, registered on a registry the caller injects.

Naming follows the Prometheus conventions: every name starts with
``seawall_``, values are in base units (seconds, ratios 0..1, plain counts),
counters end in ``_total``.  Labels are bounded: ``site`` comes from the
configured allow-list (anything else is ``other``), ``action``, ``reason``,
``label`` and ``outcome`` come from small fixed vocabularies.  No label ever
carries comment text, an author or a comment id.

Several processes
-----------------
Seawall uses **one endpoint per process**, not prometheus-client's
multiprocess mode: process ``i`` of ``seawall serve --processes N`` serves its
own registry on ``metrics.port + i``.  Every process's numbers are then
exact for that process, the registry stays injectable (multiprocess mode
chooses its value class from ``PROMETHEUS_MULTIPROC_DIR`` at import time and
cannot serve /readyz per process), and a dead process shows up as its own
``up == 0``.  Aggregate in queries: ``sum`` the counters and histograms over
instances, take ``max`` of the group-wide gauges (lag, pending, model age).
"""
from __future__ import annotations

import re
import threading
import time
from collections import deque
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, Info

from model.actions import ACTIONS, FLAGGED_ACTIONS
from worker.labels import parse_label

OTHER = "other"
RETRAIN_OUTCOMES = ("promoted", "refused", "failed", "skipped")
_REASON = re.compile(r"[a-z][a-z0-9_]{0,39}")

# Bucket edges at the latency goals of the stream worker: a 256-comment batch
# at 20,000 comments/s is scored in 12.8 ms (edge 0.0128), and the
# enqueue->verdict p99 goal is 50 ms at 2,000 comments/s (edge 0.05).
BATCH_SECONDS_BUCKETS = (0.001, 0.0025, 0.005, 0.0128, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5)
LATENCY_SECONDS_BUCKETS = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0)


class SiteLabels:
    """Map a comment's site to a bounded label: itself if allowed, else ``other``.

    Parameters
    ----------
    sites : the allow-list (``metrics.sites``).  An empty list sends every
        site to ``other``, so an unconfigured deployment still has bounded labels.
    """

    def __init__(self, *, sites: Iterable[str] = ()):
        self.sites = frozenset(s for s in sites if isinstance(s, str) and s)
        if OTHER in self.sites:
            raise ValueError(f"SiteLabels: sites must not contain the reserved name {OTHER!r}")

    def __call__(self, site) -> str:
        if isinstance(site, bytes):
            site = site.decode("utf-8", "replace")
        return site if site in self.sites else OTHER

    def all(self) -> tuple[str, ...]:
        return tuple(sorted(self.sites)) + (OTHER,)


def bounded(value, vocabulary: Iterable[str]) -> str:
    """``value`` if it is one of ``vocabulary``, else ``other``."""
    if isinstance(value, bytes):
        value = value.decode("utf-8", "replace")
    return value if value in tuple(vocabulary) else OTHER


def reason_label(reason) -> str:
    """A dead-letter reason as a label: a short code word, else ``other``.

    Reasons are code words chosen by Seawall (``missing_id``, ``poison``,
    ``feedback_*``); anything that does not look like one is not trusted.
    """
    if isinstance(reason, bytes):
        reason = reason.decode("utf-8", "replace")
    return reason if isinstance(reason, str) and _REASON.fullmatch(reason) else OTHER


@dataclass(frozen=True)
class Metrics:
    """Every Seawall metric object, as registered by :func:`build_metrics`."""

    registry: CollectorRegistry
    comments: Counter
    batch_seconds: Histogram
    latency_seconds: Histogram
    deadletters: Counter
    lag: Gauge
    pending: Gauge
    partitions_held: Gauge
    partitions: Gauge
    flagged_ratio: Gauge
    model: Info
    model_created: Gauge
    model_age: Gauge
    feedback: Counter
    retrains: Counter
    retrain_last: Gauge
    retrain_last_ts: Gauge
    waves_active: Gauge
    campaigns_active: Gauge
    reconnects: Counter
    ready: Gauge


def build_metrics(registry: CollectorRegistry) -> Metrics:
    """Register every Seawall metric on ``registry`` and return them."""
    if not isinstance(registry, CollectorRegistry):
        raise ValueError(f"build_metrics: registry must be a CollectorRegistry, got {type(registry).__name__}")
    r = registry
    return Metrics(
        registry=r,
        comments=Counter("seawall_comments", "Comments given a verdict, by action and site", ["site", "action"], registry=r),
        batch_seconds=Histogram(
            "seawall_batch_scoring_seconds", "Time to score one batch in one model call",
            buckets=BATCH_SECONDS_BUCKETS, registry=r,
        ),
        latency_seconds=Histogram(
            "seawall_verdict_latency_seconds", "Time from a comment's enqueue (stream id time) to its verdict",
            buckets=LATENCY_SECONDS_BUCKETS, registry=r,
        ),
        deadletters=Counter("seawall_deadletters", "Entries sent to the dead-letter stream, by reason", ["reason"], registry=r),
        lag=Gauge("seawall_consumer_lag", "Entries in the comments stream not yet delivered to the consumer group", registry=r),
        pending=Gauge("seawall_consumer_pending", "Entries delivered to the consumer group and not yet acknowledged", registry=r),
        partitions_held=Gauge("seawall_partitions_held",
                              "Comment stream partitions this process reads now (its leases; all of them when K = 1)",
                              registry=r),
        partitions=Gauge("seawall_partitions", "Comment stream partitions of the deployment (keys.partitions, K)",
                         registry=r),
        flagged_ratio=Gauge(
            "seawall_flagged_ratio", "Share of this process's verdicts held or rejected over the sliding window, by site",
            ["site"], registry=r,
        ),
        model=Info("seawall_model", "The model version this process serves", registry=r),
        model_created=Gauge("seawall_model_created_timestamp_seconds",
                            "When the served model was trained, or last updated by a retrain", registry=r),
        model_age=Gauge("seawall_model_age_seconds",
                        "Seconds since the served model was trained, or last updated by a retrain", registry=r),
        feedback=Counter("seawall_feedback", "Moderator feedback seen on the feedback stream, by label", ["label"], registry=r),
        retrains=Counter("seawall_retrain_runs", "Retrain runs seen on the events stream, by outcome", ["outcome"], registry=r),
        retrain_last=Gauge(
            "seawall_retrain_last_outcome", "1 for the outcome of the most recent retrain, 0 for the others",
            ["outcome"], registry=r,
        ),
        retrain_last_ts=Gauge("seawall_retrain_last_timestamp_seconds", "Time of the most recent retrain event", registry=r),
        waves_active=Gauge("seawall_wave_active", "1 while a flagged-rate wave is active on the site", ["site"], registry=r),
        campaigns_active=Gauge("seawall_campaigns_active", "Near-duplicate campaigns currently active", registry=r),
        reconnects=Counter("seawall_redis_reconnects", "Reconnections to Redis after a lost connection", registry=r),
        ready=Gauge("seawall_ready", "1 when connected to Redis with a model loaded", registry=r),
    )


class FlaggedWindow:
    """Per-site verdict counts over a sliding window, in one-second buckets."""

    def __init__(self, *, window_s: float = 300.0, clock: Callable[[], float] = time.time):
        if not window_s > 0:
            raise ValueError(f"FlaggedWindow: window_s must be > 0, got {window_s!r}")
        self.window_s = float(window_s)
        self.clock = clock
        self._buckets: dict[str, deque] = {}
        self._lock = threading.Lock()

    def add(self, site: str, total: int, flagged: int) -> None:
        second = int(self.clock())
        with self._lock:
            q = self._buckets.setdefault(site, deque())
            if q and q[-1][0] == second:
                _s, t, f = q[-1]
                q[-1] = (second, t + total, f + flagged)
            else:
                q.append((second, total, flagged))
            self._prune(q)

    def ratio(self, site: str) -> float:
        with self._lock:
            q = self._buckets.get(site)
            if not q:
                return 0.0
            self._prune(q)
            total = sum(t for _s, t, _f in q)
            return sum(f for _s, _t, f in q) / total if total else 0.0

    def _prune(self, q: deque) -> None:
        cutoff = self.clock() - self.window_s
        while q and q[0][0] < cutoff:
            q.popleft()


class PrometheusObserver:
    """The worker's :class:`WorkerObserver`, recording into :class:`Metrics`.

    The worker calls it from its loop; the HTTP server reads the registry from
    another thread, which prometheus-client's metric objects allow.

    Parameters
    ----------
    metrics : from :func:`build_metrics`.
    sites : the site allow-list (``metrics.sites``).
    flagged_window_s : window of the ``seawall_flagged_ratio`` gauge.
    partitions : the deployment's comment stream partitions (``keys.partitions``).
    clock : wall clock, injectable for tests.
    """

    def __init__(self, *, metrics: Metrics, sites: Iterable[str] = (), flagged_window_s: float = 300.0,
                 partitions: int = 1, clock: Callable[[], float] = time.time):
        if not isinstance(metrics, Metrics):
            raise ValueError(f"PrometheusObserver: metrics must come from build_metrics, got {type(metrics).__name__}")
        self.metrics = metrics
        self.site_label = SiteLabels(sites=sites)
        self.window = FlaggedWindow(window_s=flagged_window_s, clock=clock)
        self.clock = clock
        self.model_loaded = False
        self._created_at: float | None = None
        for site in self.site_label.all():
            metrics.flagged_ratio.labels(site).set_function(lambda s=site: self.window.ratio(s))
            metrics.waves_active.labels(site).set(0)
        metrics.model_age.set_function(self._model_age)
        metrics.partitions.set(partitions)

    @classmethod
    def for_config(cls, config, registry: CollectorRegistry, *, clock: Callable[[], float] = time.time):
        """The observer of one serving process, on a fresh ``registry``, from the Config's
        ``[metrics]`` sites and window and its ``keys.partitions``."""
        return cls(metrics=build_metrics(registry), sites=config.metrics.sites,
                   flagged_window_s=config.metrics.flagged_window_s, partitions=config.keys.partitions, clock=clock)

    # -- WorkerObserver -------------------------------------------------
    def on_batch(self, size: int, seconds: float) -> None:
        if size > 0:
            self.metrics.batch_seconds.observe(max(0.0, float(seconds)))

    def on_verdicts(self, verdicts: Iterable[Mapping]) -> None:
        per_site: dict[str, list[int]] = {}
        for v in verdicts:
            site = self.site_label(_field(v, "site"))
            action = bounded(_field(v, "action"), ACTIONS)
            self.metrics.comments.labels(site, action).inc()
            counts = per_site.setdefault(site, [0, 0])
            counts[0] += 1
            counts[1] += action in FLAGGED_ACTIONS
            latency = _field(v, "latency_s")
            if isinstance(latency, (int, float)) and latency >= 0:
                self.metrics.latency_seconds.observe(float(latency))
        for site, (total, flagged) in per_site.items():
            self.window.add(site, total, flagged)

    def on_deadletter(self, reason) -> None:
        self.metrics.deadletters.labels(reason_label(reason)).inc()

    def on_model(self, version, created_at) -> None:
        self.metrics.model.info({"version": str(version)[:64]})
        if isinstance(created_at, (int, float)) and created_at > 0:
            self._created_at = float(created_at)
            self.metrics.model_created.set(created_at)
        self.model_loaded = True

    def on_lag(self, lag, pending, partitions=None) -> None:
        if lag is not None:
            self.metrics.lag.set(max(0, lag))
        if pending is not None:
            self.metrics.pending.set(max(0, pending))
        if partitions is not None:
            self.metrics.partitions_held.set(partitions)

    def on_reconnect(self) -> None:
        self.metrics.reconnects.inc()

    # -- beyond the worker's protocol ---------------------------------------
    def on_feedback(self, label) -> None:
        try:
            name = parse_label(label)
        except ValueError:
            name = OTHER
        self.metrics.feedback.labels(name).inc()

    def on_retrain(self, outcome, ts: float | None = None, *, count: bool = True) -> None:
        """A retrain finished with ``outcome``; it becomes the last outcome (``count=False``: seen before start-up)."""
        outcome = bounded(outcome, RETRAIN_OUTCOMES)
        if count:
            self.metrics.retrains.labels(outcome).inc()
        for o in RETRAIN_OUTCOMES + (OTHER,):
            self.metrics.retrain_last.labels(o).set(1 if o == outcome else 0)
        self.metrics.retrain_last_ts.set(ts if ts is not None else self.clock())

    def set_waves(self, active_sites: Iterable[str]) -> None:
        active = {self.site_label(s) for s in active_sites}
        for site in self.site_label.all():
            self.metrics.waves_active.labels(site).set(1 if site in active else 0)

    def set_campaigns(self, count: int) -> None:
        self.metrics.campaigns_active.set(max(0, int(count)))

    def set_ready(self, ready: bool) -> None:
        self.metrics.ready.set(1 if ready else 0)

    def _model_age(self) -> float:
        return max(0.0, self.clock() - self._created_at) if self._created_at else 0.0


def _field(entry, name):
    """A field of a verdict given as a mapping (str or bytes keys) or an object."""
    if isinstance(entry, Mapping):
        value = entry.get(name)
        if value is None:
            value = entry.get(name.encode())
        return value
    return getattr(entry, name, None)
