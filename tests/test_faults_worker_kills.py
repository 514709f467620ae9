"""SIGKILL real workers at random points of a 20,000-comment run: nothing lost, nothing doubled."""
from __future__ import annotations

import json
import random

import pytest

from faults_kit import (KEYS, Producer, deadletters, group_lag, group_pending, kill_mid_batch, kills_on_fresh_backlogs,
                        slice_of, start_workers, tally, verdict_ids)
from kit import stop_all, wait_for_progress, wait_until

pytestmark = [pytest.mark.redis_server, pytest.mark.slow]

COMMENTS = 20_000
KILLS = 20
# The run may take as long as the machine needs; it fails only if the verdict count stands still this long.
STALL_S = 60.0


def test_twenty_sigkills_during_a_20000_comment_run_lose_and_double_nothing(redis_server, tmp_path):
    client = redis_server.client()
    rng = random.Random(20)
    # Kills are the test's doing, not the entries': lift the poison limit so that an entry
    # caught in several kills is not dead-lettered (poison has its own unit test).
    workers = start_workers(redis_server.url, tmp_path, env={"SEAWALL_WORKER_MAX_DELIVERIES": "1000"})
    kills = []
    try:
        # The run goes in slices, one before each kill, so that every kill finds a backlog; each kill aims
        # at a worker holding unacknowledged entries (mid-batch) and restarts it under the same name or a
        # new one, in turns.
        producer = Producer(url=redis_server.url, n=COMMENTS, rate=1e9)
        for name, held in kills_on_fresh_backlogs(
                workers, rng, kills=KILLS, feed=lambda k: producer.send(slice_of(COMMENTS, k, KILLS + 2)),
                kill=lambda k: kill_mid_batch(client, workers, rng, k)):
            kills.append({"worker": name, "pending_at_kill": held})
        wait_for_progress(lambda: client.xlen(KEYS.verdicts) >= COMMENTS and group_pending(client) == 0,
                          lambda: (client.xlen(KEYS.verdicts), group_pending(client)), stall_s=STALL_S,
                          interval=0.2, what="every verdict, nothing pending (progress: verdicts, pending)")
        counts = verdict_ids(client)
        # A worker restarted by the last kill may still be starting; let it join before SIGTERM.
        assert wait_until(lambda: all(w.started() for w in workers), timeout=60)
    finally:
        codes = stop_all(workers)
    lost, duplicates = tally(counts, COMMENTS)
    mid_batch = sum(1 for k in kills if k["pending_at_kill"] > 0)
    print("faults:", json.dumps({"test": "worker_kills", "comments": COMMENTS, "kills": len(kills),
                                 "kills_mid_batch": mid_batch, "lost": lost, "duplicates": duplicates,
                                 "pending": group_pending(client), "deadletters": client.xlen(KEYS.deadletter)}))
    assert set(counts) == {f"c{i}" for i in range(COMMENTS)}
    assert lost == 0 and duplicates == 0
    assert client.xlen(KEYS.verdicts) == COMMENTS
    assert group_pending(client) == 0 and group_lag(client) in (0, None)
    assert deadletters(client) == []
    assert mid_batch >= KILLS // 2, kills  # the kills really hit workers in the middle of their work
    assert codes == [0, 0]  # the survivors still stop cleanly on SIGTERM
