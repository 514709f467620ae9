"""The monitor pass: shared state from Redis into gauges and counters."""
from __future__ import annotations

import json

from prometheus_client import CollectorRegistry

from ops.metrics import PrometheusObserver, build_metrics
from ops.monitor import Monitor, retrain_outcome
from worker.events import add_event
from worker.settings import Keys

KEYS = Keys()


def monitor(client, registry):
    obs = PrometheusObserver(metrics=build_metrics(registry), sites=["news.example"])
    return Monitor(client=client, keys=KEYS, observer=obs, detector=None, poll_s=1.0), obs


def test_last_retrain_feedback_waves_and_campaigns(fake_redis):
    add_event(fake_redis, KEYS.events, "retrain", {"decision": "promoted"}, ts=100.0)
    add_event(fake_redis, KEYS.events, "retrain", {"decision": "refused", "reasons": ["auc"]}, ts=200.0)
    fake_redis.xadd(KEYS.feedback, {"id": "c1", "label": "spam"})
    registry = CollectorRegistry()
    mon, obs = monitor(fake_redis, registry)
    get = registry.get_sample_value
    mon.refresh()
    # history before start-up sets the last outcome but is not counted as runs of this process
    assert get("seawall_retrain_last_outcome", {"outcome": "refused"}) == 1
    assert get("seawall_retrain_last_timestamp_seconds") == 200.0
    assert get("seawall_retrain_runs_total", {"outcome": "refused"}) is None
    assert get("seawall_feedback_total", {"label": "spam"}) is None

    add_event(fake_redis, KEYS.events, "retrain", {"decision": "promoted"}, ts=300.0)
    add_event(fake_redis, KEYS.events, "wave_start", {"site": "news.example"}, ts=300.0)
    for label in ("spam", "ham", "ham", "<b>odd</b>"):
        fake_redis.xadd(KEYS.feedback, {"id": "c2", "label": label})
    fake_redis.hset("seawall:waves:active", "news.example", json.dumps({"minute": 1}))
    fake_redis.hset("seawall:campaigns:active", "c1", json.dumps({"id": "c1"}))
    mon.refresh()
    assert get("seawall_retrain_runs_total", {"outcome": "promoted"}) == 1
    assert get("seawall_retrain_last_outcome", {"outcome": "promoted"}) == 1
    assert get("seawall_retrain_last_outcome", {"outcome": "refused"}) == 0
    assert get("seawall_feedback_total", {"label": "ham"}) == 2
    assert get("seawall_feedback_total", {"label": "other"}) == 1
    assert get("seawall_wave_active", {"site": "news.example"}) == 1
    assert get("seawall_wave_active", {"site": "other"}) == 0
    assert get("seawall_campaigns_active") == 1
    mon.refresh()  # nothing new: nothing counted twice
    assert get("seawall_feedback_total", {"label": "ham"}) == 2


def test_empty_redis_is_fine(fake_redis):
    registry = CollectorRegistry()
    mon, _obs = monitor(fake_redis, registry)
    mon.refresh()
    assert registry.get_sample_value("seawall_campaigns_active") == 0


def test_retrain_outcome_mapping():
    assert retrain_outcome({"decision": "promoted"}) == "promoted"
    assert retrain_outcome({"decision": "skipped"}) == "skipped"
    assert retrain_outcome({"decision": "refused", "error": "boom"}) == "failed"
    assert retrain_outcome({"decision": "exploded"}) == "other"
    assert retrain_outcome({}) == "other"
