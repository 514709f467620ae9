"""`seawall serve` as a subprocess against a real redis-server, with the real model.

Kill -9 mid-stream and restart, a stalled worker whose entries are reclaimed,
hot reload and a corrupt artifact, graceful SIGTERM, and a Redis restart: in
each case every comment id ends with exactly one verdict and nothing stays
pending.  Loops are bounded in count and time.
"""
from __future__ import annotations

import collections
import os
import signal
import time

import pytest
import redis

from kit import Worker, wait_until
from worker_models import tiny_model
from ops.bench.stream import invented_comments
from worker.settings import Keys

pytestmark = pytest.mark.redis_server

KEYS = Keys()


@pytest.fixture(scope="module")
def model_files():
    """Two small real models (different training data, so different versions)."""
    return [tiny_model(1), tiny_model(2)]


# The integration tests' worker settings: fast reloads and backoff, no metrics endpoint.
WORKER_ENV = {"SEAWALL_WORKER_RELOAD_POLL_S": "0.1", "SEAWALL_WORKER_BACKOFF_BASE_S": "0.05",
              "SEAWALL_WORKER_BACKOFF_CAP_S": "0.5", "SEAWALL_METRICS_PORT": "0"}


def serve_worker(url, model, name, tmp_path, *, detectors=False, **settings) -> Worker:
    """A started `seawall serve` (kit.Worker) with those settings; ``settings`` are worker.* overrides."""
    # The wave and campaign detectors have their own tests; most of these time the worker alone.
    env = {} if detectors else {"SEAWALL_WAVES_ENABLED": "0"}
    env.update({f"SEAWALL_WORKER_{k.upper()}": str(v) for k, v in settings.items()})
    return Worker(url=url, name=name, log_dir=tmp_path, model_path=model, env=env, args=["--block-ms", "50"],
                  base_env=WORKER_ENV).start()


@pytest.fixture
def workers():
    started = []
    yield started
    for w in started:
        if w.proc.poll() is None:
            w.proc.kill()
            w.proc.wait(timeout=10)


def send(client, n, *, start=0, bad_every=0):
    """``n`` comments ``c<start>..``; with ``bad_every``, every k-th entry lacks its text instead."""
    texts = invented_comments(200, seed=9)
    pipe = client.pipeline(transaction=False)
    good = []
    for i in range(start, start + n):
        if bad_every and i % bad_every == 0:
            pipe.xadd(KEYS.comments, {"id": f"c{i}", "site": "a.example"})
        else:
            pipe.xadd(KEYS.comments, {"id": f"c{i}", "text": texts[i % 200][0], "site": "a.example"})
            good.append(f"c{i}")
    pipe.execute()
    return good


def verdict_rows(client):
    return [{k.decode(): v.decode() for k, v in fields.items()} for _id, fields in client.xrange(KEYS.verdicts)]


def pending_count(client, consumer=None):
    if consumer is None:
        return client.xpending(KEYS.comments, KEYS.group)["pending"]
    return len(client.xpending_range(KEYS.comments, KEYS.group, "-", "+", 100_000, consumername=consumer))


def assert_exactly_once(client, expected_ids):
    counts = collections.Counter(v["id"] for v in verdict_rows(client))
    doubled = {i: n for i, n in counts.items() if n > 1}
    assert not doubled, f"duplicate verdicts: {list(doubled.items())[:5]}"
    assert set(counts) == set(expected_ids)
    assert pending_count(client) == 0


def test_sigkill_mid_stream_then_restart_gives_every_id_one_verdict(redis_server, model_files, tmp_path, workers):
    client = redis_server.client()
    good = send(client, 5000, bad_every=200)                      # 25 entries without text
    (model, _version), _ = model_files
    w = serve_worker(redis_server.url, model, "w1", tmp_path, detectors=True, batch=100)   # everything serve runs
    workers.append(w)
    wait_until(lambda: client.xlen(KEYS.verdicts) >= 1000, timeout=30, interval=0.01, what="1000 verdicts")
    w.kill()
    at_kill = client.xlen(KEYS.verdicts)
    assert at_kill < len(good), "the worker finished before it could be killed mid-stream"
    again = serve_worker(redis_server.url, model, "w1", tmp_path, detectors=True, batch=100)
    workers.append(again)
    wait_until(lambda: client.xlen(KEYS.verdicts) >= len(good) and client.xlen(KEYS.deadletter) >= 25
               and pending_count(client) == 0, timeout=30, interval=0.01, what="all verdicts after the restart")
    assert again.stop() == 0
    assert_exactly_once(client, good)
    reasons = collections.Counter(f[b"reason"] for _id, f in client.xrange(KEYS.deadletter))
    assert reasons == {b"missing_text": 25}
    assert client.hget(KEYS.text(good[0]), "text") is not None


def test_stalled_worker_is_reclaimed_and_both_finishing_write_no_duplicates(redis_server, model_files, tmp_path,
                                                                             workers):
    client = redis_server.client()
    (model, _version), _ = model_files
    settings = {"batch": 200, "claim_idle_ms": 400, "claim_every_s": 0.1}
    slow = serve_worker(redis_server.url, model, "slow", tmp_path, **settings)
    fast = serve_worker(redis_server.url, model, "fast", tmp_path, **settings)
    workers += [slow, fast]
    wait_until(lambda: client.exists(KEYS.comments) and client.xinfo_groups(KEYS.comments)
               and len(client.xinfo_consumers(KEYS.comments, KEYS.group)) == 2, timeout=30, interval=0.01,
               what="both workers to be reading")
    good = send(client, 2000)                                     # both share the stream from the start
    wait_until(lambda: pending_count(client, "slow"), timeout=30, interval=0.01, what="the slow worker's first batch")
    for _attempt in range(50):                                    # stall it while it holds a batch
        slow.signal(signal.SIGSTOP)
        held = pending_count(client, "slow")
        if held:
            break
        slow.signal(signal.SIGCONT)
        time.sleep(0.005)
    assert held, "could not stop the slow worker while it held a batch"
    wait_until(lambda: client.xlen(KEYS.verdicts) >= len(good) and pending_count(client) == 0, timeout=60,
               interval=0.01, what="the fast worker to finish everything, the stalled batch included")
    slow.signal(signal.SIGCONT)                                   # the slow one wakes and commits its stale batch
    wait_until(lambda: "already had a verdict" in slow.output(), timeout=20, interval=0.01, what="the slow worker's commit")
    assert slow.stop() == 0 and fast.stop() == 0
    assert "took over" in fast.output()
    assert_exactly_once(client, good)


def test_hot_reload_from_a_changed_file_and_a_corrupt_file_is_refused(redis_server, model_files, tmp_path, workers):
    client = redis_server.client()
    (first, v1), (second, v2) = model_files
    serving = tmp_path / "serving.bin"
    serving.write_bytes(first.read_bytes())
    w = serve_worker(redis_server.url, serving, "w1", tmp_path)
    workers.append(w)
    send(client, 10, start=0)
    wait_until(lambda: client.xlen(KEYS.verdicts) >= 10, timeout=30, interval=0.01, what="verdicts from v1")

    corrupt = tmp_path / "corrupt.tmp"
    data = second.read_bytes()
    corrupt.write_bytes(data[: len(data) // 2])                   # a half-copied artifact
    os.replace(corrupt, serving)
    wait_until(lambda: "refused" in w.output(), timeout=30, interval=0.01, what="the corrupt artifact to be refused")
    send(client, 10, start=10)
    wait_until(lambda: client.xlen(KEYS.verdicts) >= 20, timeout=30, interval=0.01, what="verdicts after the corrupt file")

    fresh = tmp_path / "fresh.tmp"
    fresh.write_bytes(second.read_bytes())
    os.replace(fresh, serving)
    wait_until(lambda: f"now serving {v2}" in w.output(), timeout=30, interval=0.01, what="the new model to load")
    send(client, 10, start=20)
    wait_until(lambda: client.xlen(KEYS.verdicts) >= 30, timeout=30, interval=0.01, what="verdicts from v2")
    assert w.stop() == 0
    models = [v["model"] for v in verdict_rows(client)]
    assert models == [v1] * 20 + [v2] * 10


def test_sigterm_finishes_and_acks_the_batch_then_exits_0(redis_server, model_files, tmp_path, workers):
    client = redis_server.client()
    send(client, 20_000)  # enough that a fast worker is still busy when the signal lands
    (model, _version), _ = model_files
    w = serve_worker(redis_server.url, model, "w1", tmp_path, batch=250)
    workers.append(w)
    wait_until(lambda: client.xlen(KEYS.verdicts) >= 500, timeout=30, interval=0.01, what="500 verdicts")
    w.signal(signal.SIGTERM)
    assert w.proc.wait(timeout=20) == 0
    (group,) = [g for g in client.xinfo_groups(KEYS.comments) if g["name"] == KEYS.group.encode()]
    delivered = group["entries-read"]
    assert pending_count(client) == 0                             # the batch in hand was committed
    assert client.xlen(KEYS.verdicts) == delivered < 20_000       # everything read got its verdict, then it stopped
    assert "stopped" in w.output()


@pytest.mark.slow
def test_redis_restart_mid_stream_loses_nothing_the_server_kept(redis_factory, model_files, tmp_path, workers):
    server = redis_factory("aof", appendonly=True)
    client = server.client()
    # Enough comments that a fast worker (over 20,000/s) is still busy when the server goes down.
    first = send(client, 20_000)
    (model, _version), _ = model_files
    w = serve_worker(server.url, model, "w1", tmp_path, batch=100)
    workers.append(w)
    wait_until(lambda: client.xlen(KEYS.verdicts) >= 300, timeout=30, interval=0.01, what="the first verdicts")
    server.restart(downtime=0.5)
    client = server.client()
    wait_until(lambda: _answers(client), timeout=30, interval=0.01, what="the restarted server to finish loading its AOF")
    assert client.xlen(KEYS.verdicts) < 20_000, "the worker finished before the restart"
    second = send(client, 500, start=20_000)
    wait_until(lambda: client.xlen(KEYS.verdicts) >= 20_500 and pending_count(client) == 0, timeout=90,
               interval=0.01, what="every verdict after the restart")
    assert w.stop() == 0
    log = w.output()
    assert "lost connection to Redis" in log and "reconnected to Redis" in log
    assert_exactly_once(client, first + second)


def _answers(client) -> bool:
    try:
        return bool(client.ping())
    except redis.exceptions.BusyLoadingError:
        return False
