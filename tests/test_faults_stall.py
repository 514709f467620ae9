"""Slow workers: stalled (SIGSTOP) past the reclaim time while another takes their entries over.

Each stall freezes a worker while it holds a batch, long enough for the other
to claim that batch with XAUTOCLAIM and commit it; then the frozen one wakes
(SIGCONT) and commits its stale copy.  The XACK guard inside the commit
script must turn every such late commit into nothing.
"""
from __future__ import annotations

import json
import random
import signal
import time

import pytest

from faults_kit import (KEYS, Producer, consumer_pending, consumer_seen, deadletters, doubled, group_pending,
                        start_workers, stop_run, wait_for_verdicts)
from kit import wait_until

pytestmark = [pytest.mark.redis_server, pytest.mark.slow]

STALLS = 6
CLAIM_IDLE_MS = 800


def test_stalled_workers_past_the_reclaim_time_write_no_duplicate_verdicts(redis_server, tmp_path):
    admin = redis_server.client()
    workers = start_workers(redis_server.url, tmp_path, env={
        "SEAWALL_WORKER_CLAIM_IDLE_MS": str(CLAIM_IDLE_MS), "SEAWALL_WORKER_CLAIM_EVERY_S": "0.1",
        "SEAWALL_WORKER_BATCH": "50"})
    n = 3000
    rng = random.Random(11)
    stalls = []
    producer = Producer(url=redis_server.url, n=n, rate=400.0)
    try:
        assert wait_until(lambda: all(consumer_seen(admin, w.name) for w in workers), timeout=60)
        producer.start()  # a steady stream, so that there are batches to stall on throughout
        for k in range(STALLS):
            slow, other = workers[k % 2], workers[(k + 1) % 2]
            held = 0
            for _attempt in range(200):  # freeze it at a moment when it holds a batch
                slow.signal(signal.SIGSTOP)
                # A commit the worker sent just before the stop still lands: look again
                # once it has, so that only a batch nobody but a takeover can finish counts.
                time.sleep(0.05)
                held = consumer_pending(admin, slow.name)
                if held:
                    break
                slow.signal(signal.SIGCONT)
                time.sleep(rng.uniform(0.001, 0.01))
            if not held:
                break  # the run is over: nothing left to hold
            # Stalled past the reclaim time: the other worker takes the batch over.
            taken = wait_until(lambda: consumer_pending(admin, slow.name) == 0, timeout=30, interval=0.05)
            time.sleep(rng.uniform(0.0, 0.3))
            slow.signal(signal.SIGCONT)
            stalls.append({"worker": slow.name, "held": held, "taken_over": bool(taken)})
            time.sleep(rng.uniform(0.1, 0.4))
        producer.join(timeout=60)
        counts = wait_for_verdicts(admin, n)
    finally:
        codes = stop_run(producer, workers)
    duplicates = doubled(counts)
    late = sum(w.output().count("already had a verdict") for w in workers)
    print("faults:", json.dumps({"test": "stalls", "stalls": len(stalls),
                                 "taken_over": sum(s["taken_over"] for s in stalls),
                                 "comments": n, "lost": n - len(counts), "duplicates": duplicates,
                                 "late_commits_skipped": late}))
    assert len(stalls) >= STALLS - 1, stalls
    assert all(s["taken_over"] for s in stalls), stalls
    assert set(counts) == {f"c{i}" for i in range(n)} and duplicates == 0
    assert admin.xlen(KEYS.verdicts) == n
    assert deadletters(admin) == [] and group_pending(admin) == 0
    assert late >= 1  # the woken workers did try to commit their stale batches, and wrote nothing
    assert sum(w.output().count("took over") for w in workers) >= len(stalls)
    assert codes == [0, 0]
