"""Control-plane settings sections: retraining, metrics and wave detection.

Like the worker's sections these are frozen dataclasses whose fields carry a
``help`` text; ``ops.config`` fills them once at start-up.
"""
from __future__ import annotations

from dataclasses import dataclass

from worker.settings import setting


@dataclass(frozen=True, kw_only=True)
class RetrainSettings:
    """How the scheduled retrain builds, gates and promotes a candidate."""

    cron: str = setting("0 3 * * *", "cron string (UTC) of the nightly retrain on RQ's cron scheduler")


@dataclass(frozen=True, kw_only=True)
class MetricsSettings:
    """Where the Prometheus endpoint listens."""

    port: int = setting(9310, "metrics port (/metrics, /healthz, /readyz); 0 turns the endpoint off")
    host: str = setting("127.0.0.1", "metrics bind address; loopback unless you mean to expose it")


@dataclass(frozen=True, kw_only=True)
class WaveSettings:
    """Flagged-rate wave detection and near-duplicate campaign detection."""

    enabled: bool = setting(True, "run the wave and campaign detectors")
