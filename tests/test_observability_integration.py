"""A real worker's metrics endpoint, scraped by a real Prometheus; no comment text leaks.

`seawall serve` runs as a subprocess against a real redis-server with a small
real model and ``--metrics-port``.  The test sends invented comments carrying
a unique marker word (in the text, the author and the site), then checks:

* /metrics counts them, /healthz and /readyz answer;
* a near-duplicate campaign among them is announced and its members are held;
* a real Prometheus server (Debian package ``prometheus``) on a free loopback
  port scrapes the endpoint, and its HTTP API returns ``seawall_comments_total``;
* the marker word appears neither in /metrics nor anywhere in the worker's log
  (run at DEBUG level).
"""
from __future__ import annotations

import json
import os
import secrets
import shutil
import signal
import subprocess
import sys
import time
import urllib.error
import urllib.parse
import urllib.request

import pytest

from kit import terminate, wait_until
from ops.bench.stream import invented_comments
from servers import free_port, require, wait_for_port
from worker.events import parse_event
from worker.settings import Keys

pytestmark = pytest.mark.redis_server
KEYS = Keys()


def fetch(url: str) -> tuple[int, str]:
    try:
        with urllib.request.urlopen(url, timeout=5) as resp:
            return resp.status, resp.read().decode()
    except urllib.error.HTTPError as err:
        return err.code, err.read().decode()


@pytest.fixture(scope="module")
def model_file(tmp_path_factory):
    from model.classifier import EmbeddingClassifier

    data = invented_comments(400, seed=5)
    path = tmp_path_factory.mktemp("obs-model") / "model.bin"
    EmbeddingClassifier(seed=5, epochs=3).fit([t for t, _ in data], [y for _, y in data]).save(path)
    return path


@pytest.fixture
def worker(redis_server, model_file, tmp_path):
    port = free_port()
    env = {k: v for k, v in os.environ.items() if not k.startswith("SEAWALL_")}
    # a one-second campaign warm-up: the authors of the first comments are the site's regulars
    env.update({"SEAWALL_METRICS_POLL_S": "0.3", "SEAWALL_METRICS_SITES": "news.example",
                "SEAWALL_WAVES_CAMPAIGN_WARMUP_S": "1"})
    log_path = tmp_path / "worker.log"
    log = open(log_path, "wb")
    proc = subprocess.Popen(
        [sys.executable, "-m", "ops.cli", "serve", "--redis", redis_server.url, "--model", str(model_file),
         "--consumer", "obs-1", "--block-ms", "50", "--metrics-port", str(port), "--log-level", "DEBUG"],
        env=env, stdout=log, stderr=subprocess.STDOUT,
    )
    try:
        wait_for_port("127.0.0.1", port, timeout=30)
        yield {"url": f"http://127.0.0.1:{port}", "port": port, "log": log_path, "proc": proc}
    finally:
        terminate(proc)
        log.close()


def send_comments(client, marker: str) -> int:
    """Ordinary comments from the site's regulars, some from an unlisted site, then (once the detector's
    one-second warm-up is over) a 14-comment campaign from new accounts; returns how many."""
    n = 0
    for i, (text, _label) in enumerate(invented_comments(60, seed=9)):
        site = "news.example" if i % 2 else f"{marker}.example"
        client.xadd(KEYS.comments, {"id": f"o{i}", "text": f"{text} {marker}", "site": site,
                                    "author": f"{marker}-user{i}"})
        n += 1
    wait_until(lambda: client.xlen(KEYS.verdicts) >= n, timeout=30, what="the regulars' verdicts")
    time.sleep(1.5)
    for i in range(14):
        text = (f"hello friend {i} I earned 900 dollars this week from home with one odd trick {marker} "
                f"see easycash{i}.invalid before it is gone")
        client.xadd(KEYS.comments, {"id": f"k{i}", "text": text, "site": "news.example", "author": f"{marker}-bot{i}"})
        n += 1
    return n


def sample(body: str, name: str, **labels) -> float | None:
    from prometheus_client.parser import text_string_to_metric_families

    for family in text_string_to_metric_families(body):
        for s in family.samples:
            if s.name == name and all(s.labels.get(k) == v for k, v in labels.items()):
                return s.value
    return None


@pytest.mark.slow
def test_real_worker_metrics_scraped_by_real_prometheus_without_leaking_text(worker, redis_client, tmp_path):
    require(shutil.which("prometheus") is not None, "prometheus binary not on PATH (Debian package prometheus)")
    marker = "mk" + secrets.token_hex(6)
    assert fetch(worker["url"] + "/healthz")[0] == 200
    sent = send_comments(redis_client, marker)
    wait_until(lambda: redis_client.xlen(KEYS.verdicts) >= sent, timeout=30, what="every verdict")

    def total():
        body = fetch(worker["url"] + "/metrics")[1]
        got = sum(s for s in (sample(body, "seawall_comments_total", site=site, action=action)
                              for site in ("news.example", "other") for action in ("publish", "hold", "reject"))
                  if s is not None)
        return body if got == sent else None

    body = wait_until(total, timeout=10, what="/metrics to count every verdict")
    assert sample(body, "seawall_model_info") == 1.0
    assert sample(body, "seawall_verdict_latency_seconds_count") == sent
    assert fetch(worker["url"] + "/readyz")[0] == 200

    # the campaign: announced once, its later members held
    events = [parse_event(i, f) for i, f in redis_client.xrange(KEYS.events)]
    starts = [e for e in events if e.type == "campaign_start"]
    assert len(starts) == 1, [e.type for e in events]
    verdicts = {f[b"id"].decode(): f[b"action"].decode() for _i, f in redis_client.xrange(KEYS.verdicts)}
    assert verdicts["k13"] in ("hold", "reject")
    wait_until(lambda: sample(fetch(worker["url"] + "/metrics")[1], "seawall_campaigns_active") == 1.0,
               timeout=10, what="the campaigns gauge")

    # a real Prometheus scrapes the endpoint and answers through its HTTP API
    prom_port = free_port()
    config = tmp_path / "prometheus.yml"
    config.write_text(
        "global:\n  scrape_interval: 1s\n"
        "scrape_configs:\n  - job_name: seawall\n    static_configs:\n"
        f"      - targets: ['127.0.0.1:{worker['port']}']\n"
    )
    prom_log = open(tmp_path / "prometheus.log", "wb")
    prom = subprocess.Popen(
        ["prometheus", f"--config.file={config}", f"--storage.tsdb.path={tmp_path / 'tsdb'}",
         f"--web.listen-address=127.0.0.1:{prom_port}"],
        stdout=prom_log, stderr=subprocess.STDOUT,
    )
    try:
        wait_for_port("127.0.0.1", prom_port, timeout=30)
        query = urllib.parse.quote("sum(seawall_comments_total)")

        def answered():
            status, text = fetch(f"http://127.0.0.1:{prom_port}/api/v1/query?query={query}")
            result = json.loads(text)["data"]["result"] if status == 200 else []
            return result if result and float(result[0]["value"][1]) == sent else None

        result = wait_until(answered, timeout=30, what="Prometheus to return seawall_comments_total")
        assert float(result[0]["value"][1]) == sent
        status, text = fetch(f"http://127.0.0.1:{prom_port}/api/v1/query?query=up")
        assert json.loads(text)["data"]["result"][0]["value"][1] == "1"
    finally:
        terminate(prom)
        prom_log.close()

    # the marker word never reached a label or a log line
    assert marker not in fetch(worker["url"] + "/metrics")[1]
    worker["proc"].send_signal(signal.SIGTERM)
    assert worker["proc"].wait(timeout=20) == 0
    log_text = worker["log"].read_text(errors="replace")
    assert "DEBUG" in log_text or "INFO" in log_text  # the log is not empty, so the check means something
    assert marker not in log_text


def free_port_pair() -> int:
    """A port P with P + 1 free as well (both checked by binding)."""
    import socket

    for _ in range(50):
        p = free_port()
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
            try:
                s.bind(("127.0.0.1", p + 1))
            except OSError:
                continue
        return p
    raise RuntimeError("no two consecutive free loopback ports")


@pytest.mark.slow
def test_processes_each_serve_their_own_endpoint(redis_server, model_file, tmp_path):
    """`--processes 2 --metrics-port P`: process i serves on P + i, each with its own counts."""
    port = free_port_pair()
    env = {k: v for k, v in os.environ.items() if not k.startswith("SEAWALL_")}
    log = open(tmp_path / "supervisor.log", "wb")
    proc = subprocess.Popen(
        [sys.executable, "-m", "ops.cli", "serve", "--redis", redis_server.url, "--model", str(model_file),
         "--consumer", "pair", "--processes", "2", "--block-ms", "50", "--metrics-port", str(port)],
        env=env, stdout=log, stderr=subprocess.STDOUT,
    )
    try:
        for p in (port, port + 1):
            wait_for_port("127.0.0.1", p, timeout=60)
            assert fetch(f"http://127.0.0.1:{p}/healthz")[0] == 200
        client = redis_server.client()
        for i, (text, _label) in enumerate(invented_comments(200, seed=3)):
            client.xadd(KEYS.comments, {"id": f"p{i}", "text": text})
        wait_until(lambda: client.xlen(KEYS.verdicts) >= 200, timeout=30, what="every verdict")

        def counted():
            per = []
            for p in (port, port + 1):
                body = fetch(f"http://127.0.0.1:{p}/metrics")[1]
                per.append(sum(sample(body, "seawall_comments_total", site="other", action=a) or 0
                               for a in ("publish", "hold", "reject")))
            return per if sum(per) == 200 else None

        per_process = wait_until(counted, timeout=10, what="the two endpoints to add up to every verdict")
        assert sum(per_process) == 200  # summed over instances, as the dashboard does
    finally:
        terminate(proc, timeout=30)
        log.close()
