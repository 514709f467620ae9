"""The RabbitMQ transport under faults: SIGKILLed workers and a broker restart lose and double nothing.

Real ``seawall serve --source amqp://...`` processes, a real rabbitmq-server
node and a real redis-server (the state store) per test.
"""
from __future__ import annotations

import json
import random
import time

import pytest

from faults_kit import KEYS, AmqpProducer, amqp_queue_depth, deadletters, doubled, tally, verdict_ids, write_model
from kit import Worker, stop_all, wait_for_progress, wait_until

COMMENTS = 5_000
KILLS = 10
# The run may take as long as the machine needs; it fails only if the verdict count stands still this long.
STALL_S = 60.0


def amqp_workers(redis_server, rabbit_server, tmp_path, n: int = 2) -> list[Worker]:
    model = write_model(tmp_path / "model.bin")
    # Kills are the test's doing, not the messages': lift the poison limit (poison has its own test).
    env = {"SEAWALL_WORKER_MAX_DELIVERIES": "1000", "SEAWALL_AMQP_PREFETCH": "128"}
    return [Worker(url=redis_server.url, name=f"w{i}", log_dir=tmp_path, model_path=model, env=env,
                   args=["--source", rabbit_server.url]).start() for i in range(n)]


def settled(client, url: str, want: int) -> bool:
    ready, _consumers = amqp_queue_depth(url)
    return client.xlen(KEYS.verdicts) >= want and ready == 0


@pytest.mark.rabbitmq_server
@pytest.mark.redis_server
@pytest.mark.slow
def test_ten_sigkills_during_a_5000_comment_run_by_rabbitmq_lose_and_double_nothing(redis_server, rabbit_server,
                                                                                      tmp_path):
    client = redis_server.client()
    rng = random.Random(10)
    workers = amqp_workers(redis_server, rabbit_server, tmp_path)
    kills = []
    try:
        producer = AmqpProducer(url=rabbit_server.url, n=COMMENTS, rate=1e9)
        producer.run()  # the whole run is queued up front, so the workers always have a batch in hand
        assert producer.accepted == {f"c{i}" for i in range(COMMENTS)}
        for k in range(KILLS):
            due = (k + 1) * COMMENTS // (KILLS + 2)
            wait_for_progress(lambda: client.xlen(KEYS.verdicts) >= due, lambda: client.xlen(KEYS.verdicts),
                              stall_s=STALL_S, what=f"{due} verdicts before kill {k + 1}")
            time.sleep(rng.uniform(0.0, 0.2))
            victim = rng.choice([w for w in workers if w.alive()])
            before = client.xlen(KEYS.verdicts)
            assert victim.kill() == -9
            kills.append({"worker": victim.name, "verdicts_at_kill": before})
            victim.start()
        wait_for_progress(lambda: settled(client, rabbit_server.url, COMMENTS),
                          lambda: (client.xlen(KEYS.verdicts), amqp_queue_depth(rabbit_server.url)[0]),
                          stall_s=STALL_S, interval=0.2, what="every verdict, nothing left in the queue")
        counts = verdict_ids(client)
        assert wait_until(lambda: all(w.started() for w in workers), timeout=60)
    finally:
        codes = stop_all(workers)
    lost, duplicates = tally(counts, COMMENTS)
    repeats = sum(w.output().count("skipped") for w in workers)
    print("faults:", json.dumps({"test": "amqp_worker_kills", "comments": COMMENTS, "kills": len(kills),
                                 "lost": lost, "duplicates": duplicates, "batches_with_repeats": repeats,
                                 "deadletters": client.xlen(KEYS.deadletter)}))
    assert set(counts) == {f"c{i}" for i in range(COMMENTS)}
    assert lost == 0 and duplicates == 0
    assert client.xlen(KEYS.verdicts) == COMMENTS
    assert deadletters(client) == []
    assert amqp_queue_depth(rabbit_server.url)[0] == 0
    assert codes == [0, 0]  # the survivors still stop cleanly on SIGTERM


@pytest.mark.rabbitmq_server
@pytest.mark.redis_server
@pytest.mark.slow
def test_a_broker_restart_mid_stream_loses_nothing(redis_server, rabbit_server, tmp_path):
    client = redis_server.client()
    workers = amqp_workers(redis_server, rabbit_server, tmp_path)
    producer = AmqpProducer(url=rabbit_server.url, n=3_000, rate=600.0)
    try:
        assert wait_until(lambda: all(w.started() for w in workers), timeout=60, what="both workers reading")
        producer.start()
        wait_for_progress(lambda: client.xlen(KEYS.verdicts) >= 800, lambda: client.xlen(KEYS.verdicts),
                          stall_s=STALL_S, what="800 verdicts before the restart")
        rabbit_server.restart(downtime=1.0)
        assert wait_until(producer.done.is_set, timeout=300, what="the producer to finish")
        want = len(producer.accepted)
        wait_for_progress(lambda: settled(client, rabbit_server.url, want),
                          lambda: (client.xlen(KEYS.verdicts), amqp_queue_depth(rabbit_server.url)[0]),
                          stall_s=STALL_S, interval=0.2, what="a verdict for every confirmed comment")
        counts = verdict_ids(client)
        logs = [w.output() for w in workers]
    finally:
        producer.abort.set()
        codes = stop_all(workers)
    duplicates = doubled(counts)
    print("faults:", json.dumps({"test": "amqp_broker_restart", "confirmed": len(producer.accepted),
                                 "verdicts": len(counts), "duplicates": duplicates,
                                 "producer_errors": producer.errors}))
    assert producer.errors > 0  # the restart really happened under the producer
    assert all("lost connection to RabbitMQ" in log and "reconnected to RabbitMQ" in log for log in logs), logs
    assert set(producer.accepted) <= set(counts) and duplicates == 0
    assert deadletters(client) == []
    assert codes == [0, 0]
