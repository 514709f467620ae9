"""Redis faults under real workers: restarts mid-stream, no server at start-up, connections cut."""
from __future__ import annotations

import json
import random
import shutil
import time

import pytest
import redis

from faults_kit import (KEYS, Producer, consumer_seen, deadletters, doubled, group_pending, start_workers,
                        stop_run, wait_for_verdicts, write_model)
from kit import Worker, stop_all, wait_until
from ops.registry import Registry
from retrain_kit import model_bytes
from servers import RedisServer, require

pytestmark = [pytest.mark.redis_server]


def answers(client) -> bool:
    try:
        return bool(client.ping())
    except (redis.ConnectionError, redis.TimeoutError, redis.exceptions.BusyLoadingError):
        return False


@pytest.mark.slow
def test_redis_restarts_mid_stream_every_accepted_comment_gets_one_verdict(redis_factory, tmp_path):
    """AOF with appendfsync always; one graceful restart and one crash (SIGKILL) of the server."""
    server = redis_factory("aof", appendonly=True)
    admin = redis.Redis.from_url(server.url, socket_timeout=5)
    workers = start_workers(server.url, tmp_path)
    n = 3000
    producer = Producer(url=server.url, n=n, rate=300.0)
    try:
        assert wait_until(lambda: all(consumer_seen(admin, w.name) for w in workers), timeout=60)
        producer.start()
        for crash in (False, True):
            before = admin.xlen(KEYS.verdicts)
            assert wait_until(lambda: admin.xlen(KEYS.verdicts) > before + 300, timeout=60)
            if crash:
                server.kill()
                time.sleep(0.5)
                server.start()
            else:
                server.restart(downtime=0.5)
            assert wait_until(lambda: answers(admin), timeout=30)
        producer.join(timeout=120)
        assert producer.done.is_set()
        counts = wait_for_verdicts(admin, len(producer.accepted))
    finally:
        codes = stop_run(producer, workers)
    entries = admin.xlen(KEYS.comments)
    duplicates = doubled(counts)
    print("faults:", json.dumps({"test": "redis_restarts", "restarts": 2, "accepted": len(producer.accepted),
                                 "stream_entries": entries, "resent_chunks": producer.resent_chunks,
                                 "lost": len(producer.accepted - set(counts)), "duplicates": duplicates}))
    assert len(producer.accepted) == n
    assert set(counts) == producer.accepted and duplicates == 0
    assert deadletters(admin) == [] and group_pending(admin) == 0
    assert codes == [0, 0]
    for w in workers:
        log = w.output()
        assert log.count("lost connection to Redis") >= 2 and "reconnected to Redis" in log, log[-3000:]
        assert "Traceback" not in log
        delays = [float(line.split("retrying in ")[1].split("s")[0]) for line in log.splitlines()
                  if "retrying in" in line and "seawall.worker" in line]
        assert delays and max(delays) <= 0.5  # capped at worker.backoff_cap_s


@pytest.mark.slow
def test_redis_missing_at_start_up_the_worker_waits_then_works(tmp_path):
    """No server on the port yet: both model sources (file and registry) wait, log why, and then serve."""
    require(shutil.which("redis-server") is not None, "redis-server binary not on PATH")
    server = RedisServer(tmp_path / "late")  # port chosen, not started yet
    model = write_model(tmp_path / "model.bin")
    file_worker = Worker(url=server.url, name="file-w", log_dir=tmp_path, model_path=model,
                         env={"SEAWALL_KEYS_PREFIX": "file:"})
    registry_worker = Worker(url=server.url, name="reg-w", log_dir=tmp_path, env={"SEAWALL_KEYS_PREFIX": "reg:"})
    workers = [file_worker, registry_worker]
    try:
        for w in workers:
            w.start()
        assert wait_until(lambda: all(w.output().count("retrying in") >= 3 for w in workers) or
                          not all(w.alive() for w in workers), timeout=60)
        assert all(w.alive() for w in workers), [w.output()[-2000:] for w in workers]
        time.sleep(1.0)
        server.start()
        admin = server.client()
        reg_keys = type(KEYS)(prefix="reg:")
        registry = Registry(client=admin, keys=reg_keys)
        registry.promote(registry.push(model_bytes(0)))
        for keys in (type(KEYS)(prefix="file:"), reg_keys):
            for i in range(20):
                admin.xadd(keys.comments, {"id": f"c{i}", "text": f"hello number {i}"})
        assert wait_until(lambda: admin.xlen("file:verdicts") == 20 and admin.xlen("reg:verdicts") == 20,
                          timeout=60), [w.output()[-2000:] for w in workers]
    finally:
        codes = stop_all(workers)
        server.stop()
    assert codes == [0, 0]
    # The clear log line: what is being waited for, the error, and the next retry.
    expected = {"file-w": "lost connection to Redis (ConnectionError",
                "reg-w": "waiting for Redis to load the active model"}
    for w in workers:
        log = w.output()
        assert "Traceback" not in log, log[-3000:]
        waiting = [line for line in log.splitlines() if expected[w.name] in line]
        assert len(waiting) >= 3 and "Connection refused" in waiting[0] and "retrying in" in waiting[0], log[-2000:]


@pytest.mark.slow
def test_client_kill_of_the_workers_connections_reconnects_without_loss(redis_server, tmp_path):
    admin = redis_server.client()
    workers = start_workers(redis_server.url, tmp_path, env={"SEAWALL_RETRAIN_FEEDBACK_IN_SERVE": "1"})
    n, cuts = 4000, 15
    producer = Producer(url=redis_server.url, n=n, rate=400.0)
    rng = random.Random(5)
    killed = 0
    try:
        assert wait_until(lambda: all(consumer_seen(admin, w.name) for w in workers), timeout=60)
        producer.start()
        for _ in range(cuts):
            time.sleep(rng.uniform(0.2, 0.6))
            ours = [c for c in admin.client_list() if c.get("name", "").startswith("seawall")]
            for c in ours:
                killed += admin.client_kill_filter(_id=c["id"])
        producer.join(timeout=120)
        counts = wait_for_verdicts(admin, n)
    finally:
        codes = stop_run(producer, workers)
    duplicates = doubled(counts)
    print("faults:", json.dumps({"test": "client_kill", "cuts": cuts, "connections_killed": killed,
                                 "comments": n, "lost": n - len(counts), "duplicates": duplicates}))
    assert killed >= cuts * 2
    assert set(counts) == {f"c{i}" for i in range(n)} and duplicates == 0
    assert deadletters(admin) == []
    assert codes == [0, 0]
    assert all("Traceback" not in w.output() for w in workers)
