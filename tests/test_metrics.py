"""Metrics on an injected registry, bounded labels, and the HTTP endpoint."""
from __future__ import annotations

import re
import urllib.error
import urllib.request

import pytest
from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.parser import text_string_to_metric_families

from kit import Clock
from ops.httpserver import MetricsServer, redis_model_ready
from ops.metrics import (
    BATCH_SECONDS_BUCKETS,
    LATENCY_SECONDS_BUCKETS,
    PrometheusObserver,
    SiteLabels,
    build_metrics,
    reason_label,
)


@pytest.fixture
def observed():
    registry = CollectorRegistry()
    clock = Clock()
    obs = PrometheusObserver(metrics=build_metrics(registry), sites=["news.example", "forum.example"],
                             flagged_window_s=60, clock=clock)
    return registry, obs, clock


def verdict(site, action, latency=0.01):
    return {"id": "c1", "site": site, "action": action, "latency_s": latency, "score": "0.5"}


def test_counts_comments_by_site_and_action(observed):
    registry, obs, _ = observed
    obs.on_verdicts([verdict("news.example", "publish"), verdict("news.example", "hold"),
                     verdict("forum.example", "reject")])
    get = registry.get_sample_value
    assert get("seawall_comments_total", {"site": "news.example", "action": "publish"}) == 1
    assert get("seawall_comments_total", {"site": "news.example", "action": "hold"}) == 1
    assert get("seawall_comments_total", {"site": "forum.example", "action": "reject"}) == 1
    assert get("seawall_verdict_latency_seconds_count") == 3


@pytest.mark.parametrize(
    "site", ["unknown.example", "", None, b"news.example\xff", "x" * 500, "other"],
    ids=["unlisted", "empty", "missing", "bad-bytes", "huge", "literal-other"],
)
def test_unlisted_sites_become_other(observed, site):
    registry, obs, _ = observed
    obs.on_verdicts([verdict(site, "publish")])
    assert registry.get_sample_value("seawall_comments_total", {"site": "other", "action": "publish"}) == 1


def test_bytes_site_on_the_allow_list_keeps_its_name(observed):
    registry, obs, _ = observed
    obs.on_verdicts([{b"site": b"news.example", b"action": b"hold"}])
    assert registry.get_sample_value("seawall_comments_total", {"site": "news.example", "action": "hold"}) == 1


def test_unknown_action_and_reason_are_bounded(observed):
    registry, obs, _ = observed
    obs.on_verdicts([verdict("news.example", "<script>")])
    obs.on_deadletter("missing_id")
    obs.on_deadletter("Buy cheap pills at spam.example now")
    assert registry.get_sample_value("seawall_comments_total", {"site": "news.example", "action": "other"}) == 1
    assert registry.get_sample_value("seawall_deadletters_total", {"reason": "missing_id"}) == 1
    assert registry.get_sample_value("seawall_deadletters_total", {"reason": "other"}) == 1


def test_reason_label_accepts_code_words_only():
    assert reason_label("feedback_unknown_id") == "feedback_unknown_id"
    assert reason_label(b"poison") == "poison"
    assert reason_label("has space") == "other"
    assert reason_label(None) == "other"


def test_site_allow_list_rejects_reserved_name():
    with pytest.raises(ValueError, match="other"):
        SiteLabels(sites=["other"])


def test_flagged_ratio_slides_with_the_window(observed):
    registry, obs, clock = observed
    obs.on_verdicts([verdict("news.example", "hold")] + [verdict("news.example", "publish")] * 3)
    assert registry.get_sample_value("seawall_flagged_ratio", {"site": "news.example"}) == pytest.approx(0.25)
    clock.t += 30
    obs.on_verdicts([verdict("news.example", "reject")] * 4)
    assert registry.get_sample_value("seawall_flagged_ratio", {"site": "news.example"}) == pytest.approx(5 / 8)
    clock.t += 45  # the first batch is now older than the 60 s window
    assert registry.get_sample_value("seawall_flagged_ratio", {"site": "news.example"}) == pytest.approx(1.0)
    clock.t += 100
    assert registry.get_sample_value("seawall_flagged_ratio", {"site": "news.example"}) == 0.0


def test_histograms_have_edges_at_the_latency_goals(observed):
    registry, obs, _ = observed
    assert 0.05 in LATENCY_SECONDS_BUCKETS and 0.0128 in BATCH_SECONDS_BUCKETS
    obs.on_batch(256, 0.012)
    obs.on_verdicts([verdict("news.example", "publish", latency=0.049), verdict("news.example", "publish", latency=0.051)])
    assert registry.get_sample_value("seawall_batch_scoring_seconds_bucket", {"le": "0.0128"}) == 1
    assert registry.get_sample_value("seawall_verdict_latency_seconds_bucket", {"le": "0.05"}) == 1
    assert registry.get_sample_value("seawall_verdict_latency_seconds_bucket", {"le": "0.1"}) == 2


def test_model_lag_reconnect_feedback_retrain(observed):
    registry, obs, clock = observed
    obs.on_model("abc123def456", clock.t - 86400)
    obs.on_lag(42, 7)
    obs.on_reconnect()
    obs.on_feedback("spam")
    obs.on_feedback("maybe")
    obs.on_retrain("refused")
    get = registry.get_sample_value
    assert get("seawall_model_info", {"version": "abc123def456"}) == 1
    assert get("seawall_model_age_seconds") == pytest.approx(86400)
    assert get("seawall_consumer_lag") == 42 and get("seawall_consumer_pending") == 7
    assert get("seawall_partitions_held") == 0  # a source without partitions leaves it alone
    obs.on_lag(40, 6, 3)
    assert get("seawall_partitions_held") == 3 and get("seawall_partitions") == 1
    assert get("seawall_redis_reconnects_total") == 1
    assert get("seawall_feedback_total", {"label": "spam"}) == 1
    assert get("seawall_feedback_total", {"label": "other"}) == 1
    assert get("seawall_retrain_runs_total", {"outcome": "refused"}) == 1
    assert get("seawall_retrain_last_outcome", {"outcome": "refused"}) == 1
    assert get("seawall_retrain_last_outcome", {"outcome": "promoted"}) == 0
    obs.on_model("fedcba987654", clock.t)
    assert get("seawall_model_info", {"version": "fedcba987654"}) == 1
    assert get("seawall_model_info", {"version": "abc123def456"}) is None


def test_every_name_follows_the_conventions(observed):
    registry, obs, _ = observed
    for family in text_string_to_metric_families(generate_latest(registry).decode()):
        assert family.name.startswith("seawall_"), family.name
        if family.type == "counter":
            assert all(s.name.endswith(("_total", "_created")) for s in family.samples)
        assert not re.search(r"_(milliseconds|ms|minutes|percent)\b", family.name)


def test_build_metrics_rejects_a_non_registry():
    with pytest.raises(ValueError, match="registry"):
        build_metrics(object())


def fetch(url):
    try:
        with urllib.request.urlopen(url, timeout=5) as resp:
            return resp.status, resp.read().decode()
    except urllib.error.HTTPError as err:
        return err.code, err.read().decode()


def test_http_endpoints(observed, fake_redis):
    registry, obs, _ = observed
    obs.on_verdicts([verdict("news.example", "publish")])
    ready = redis_model_ready(fake_redis, lambda: obs.model_loaded)
    with MetricsServer(registry=registry, host="127.0.0.1", port=0, ready=ready) as server:
        status, body = fetch(server.url + "/metrics")
        assert status == 200 and 'seawall_comments_total{action="publish",site="news.example"} 1.0' in body
        assert fetch(server.url + "/healthz")[0] == 200
        status, body = fetch(server.url + "/readyz")
        assert status == 503 and "no model" in body
        obs.on_model("v1", 1.0)
        assert fetch(server.url + "/readyz")[0] == 200
        assert fetch(server.url + "/nope")[0] == 404


def test_readyz_reports_redis_down(observed, redis_server):
    registry, obs, _ = observed
    obs.on_model("v1", 1.0)
    client = redis_server.client(socket_timeout=1)
    with MetricsServer(registry=registry, port=0, ready=redis_model_ready(client, lambda: obs.model_loaded)) as server:
        assert fetch(server.url + "/readyz")[0] == 200
        redis_server.stop()
        status, body = fetch(server.url + "/readyz")
        assert status == 503 and "Redis unreachable" in body
        assert fetch(server.url + "/healthz")[0] == 200


@pytest.mark.parametrize("port", [-1, 70000, "9310"], ids=["negative", "too-big", "string"])
def test_server_rejects_bad_port(port):
    with pytest.raises(ValueError, match="port"):
        MetricsServer(registry=CollectorRegistry(), port=port)
