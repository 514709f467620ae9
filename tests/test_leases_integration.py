"""Partition leases between real `seawall serve` workers on a real redis-server: K = 4, two workers, one SIGKILLed."""
from __future__ import annotations

import json
import re
from collections import Counter

import pytest

from faults_kit import Producer, read_stream, start_workers
from kit import stop_all, wait_for_progress, wait_until
from worker.settings import Keys

pytestmark = [pytest.mark.redis_server]

K = 4
KEYS = Keys(partitions=K)
COMMENTS = 4_000
STALL_S = 60.0
ENV = {"SEAWALL_KEYS_PARTITIONS": str(K), "SEAWALL_WORKER_LEASE_MS": "3000",
       # Observers that read across partitions are not under test here.
       "SEAWALL_WAVES_ENABLED": "0"}


def verdicts(client) -> Counter:
    return Counter(f[b"id"].decode() for part in KEYS.parts for _, f in read_stream(client, part.verdicts))


def verdict_count(client) -> int:
    return sum(client.xlen(part.verdicts) for part in KEYS.parts)


def pending(client) -> int:
    return sum(int(client.xpending(part.comments, KEYS.group)["pending"]) for part in KEYS.parts
               if client.exists(part.comments))


def lease_owners(client) -> dict[int, str | None]:
    return {p: (v.decode() if v else None) for p in range(K) for v in [client.get(KEYS.part(p).lease)]}


def held_in_log(worker) -> list[list[int]]:
    """Every "holds partitions ..." line the worker logged, oldest first."""
    return [[int(x) for x in m.split(",")] if m != "none" else []
            for m in re.findall(r"holds partitions (\S+) of", worker.output())]


def test_two_workers_share_four_partitions_and_the_survivor_takes_over_a_killed_ones(redis_server, tmp_path):
    client = redis_server.client()
    workers = start_workers(redis_server.url, tmp_path, env=ENV)
    try:
        wait_until(lambda: all(w.started() for w in workers), timeout=60, what="both workers reading")
        # Both hold two partitions each once the second one's heartbeat is seen.
        wait_until(lambda: sorted(Counter(lease_owners(client).values()).values()) == [2, 2], timeout=30,
                   what="the four partitions shared two and two")
        Producer(url=redis_server.url, n=COMMENTS, rate=1e9, chunk=500, keys=KEYS).run()
        wait_for_progress(lambda: verdict_count(client) >= COMMENTS // 4, lambda: verdict_count(client),
                          stall_s=STALL_S, what="a quarter of the verdicts before the kill")
        # on a loaded machine a worker may miss a renewal and the other take its partitions for a while:
        # kill one at a moment they share the partitions two and two (one reading of the leases)
        shared = wait_until(lambda: (lambda o: o if sorted(Counter(o.values()).values()) == [2, 2] else None)(
            lease_owners(client)), timeout=30, what="the four partitions shared two and two before the kill")
        victim = next(w for w in workers if w.name in shared.values())
        survivor = next(w for w in workers if w is not victim)
        victims_partitions = sorted(p for p, owner in shared.items() if owner == victim.name)
        assert victim.kill() == -9
        wait_for_progress(lambda: verdict_count(client) >= COMMENTS and pending(client) == 0,
                          lambda: (verdict_count(client), pending(client)), stall_s=STALL_S, interval=0.2,
                          what="every verdict, nothing pending (progress: verdicts, pending)")
        counts = verdicts(client)
        # the dead worker's leases run out within lease_ms even when its partitions had nothing left to read
        owners = wait_until(lambda: (lambda o: o if set(o.values()) == {survivor.name} else None)(lease_owners(client)),
                            timeout=15, what="the survivor holding every partition")
    finally:
        codes = stop_all(workers)
    print("leases:", json.dumps({"comments": COMMENTS, "victim_partitions": victims_partitions,
                                 "survivor_held": held_in_log(survivor)}))
    assert set(counts) == {f"c{i}" for i in range(COMMENTS)}
    assert max(counts.values()) == 1  # each exactly one verdict
    assert set(owners.values()) == {survivor.name}  # the survivor took the dead worker's partitions
    assert held_in_log(survivor)[-1] == list(range(K))
    assert len(victims_partitions) == 2
    assert codes[workers.index(survivor)] == 0
    # A clean stop gives the leases back at once.
    assert wait_until(lambda: set(lease_owners(client).values()) == {None}, timeout=5, what="leases given back")
    assert client.zcard(KEYS.members) == 0  # the victim's heartbeat ran out, the survivor left on its stop
    assert sum(client.xlen(p.deadletter) for p in KEYS.parts if client.exists(p.deadletter)) == 0
