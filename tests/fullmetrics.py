"""A registry with every Seawall metric and label in use, for checks of queries against the exposition."""
from __future__ import annotations

from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.parser import text_string_to_metric_families

from ops.metrics import PrometheusObserver, build_metrics


def full_exposition() -> tuple[str, set[str]]:
    """The exposition text of a registry on which every hook ran once, and its sample names."""
    registry = CollectorRegistry()
    obs = PrometheusObserver(metrics=build_metrics(registry), sites=["news.example"], partitions=3)
    obs.on_batch(10, 0.01)
    obs.on_verdicts([{"site": "news.example", "action": a, "latency_s": 0.02} for a in ("publish", "hold", "reject")])
    obs.on_deadletter("missing_id")
    obs.on_model("v1", 1.0)
    obs.on_lag(1, 1, 2)
    obs.on_reconnect()
    obs.on_feedback("spam")
    obs.on_retrain("promoted")
    obs.set_waves(["news.example"])
    obs.set_campaigns(1)
    obs.set_ready(True)
    text = generate_latest(registry).decode()
    names = {s.name for f in text_string_to_metric_families(text) for s in f.samples}
    return text, names
