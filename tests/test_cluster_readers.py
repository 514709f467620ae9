"""The readers across partitions on a real Redis Cluster (tests/servers.py ``RedisCluster``), one smoke test.

A worker in cluster mode fills six partitions spread over three primaries; then the console serves one merged
queue over HTTP and two moderators decide comments from several partitions, the feedback consumer turns the
decisions into labels, ``seawall watch``'s snapshot sums every partition's counts, and a promotion's re-score
walks every partition.  Everything goes through redis-py's cluster client, so a script or transaction that
spans two slots fails here with CROSSSLOT (or the client's own refusal) instead of passing on one server.
"""
from __future__ import annotations

import time
from collections import Counter

import pytest

from console_kit import race_two_moderators, two_moderators
from kit import wait_for_progress
from ops.bench.stream import invented_comments
from ops.config import load_config
from ops.connection import connect
from ops.registry import load_model
from ops.rescore import rescore_held
from ops.serving import build_consumer
from ops.watchview import collect
from worker.connection import connect as worker_connect
from worker.feedback import FeedbackConsumer
from worker.holdqueue import held_count
from worker.labels import scan_labels
from worker.loader import StaticModelSource
from worker.partitions import key_slot, send_comment
from worker_models import tiny_model

pytestmark = [pytest.mark.redis_server, pytest.mark.slow]

SITE = "plots.example"
N = 48


def _stream(client, key) -> list[dict[str, str]]:
    return [{k.decode(): v.decode() for k, v in f.items()} for _sid, f in client.xrange(key)]


def fill_through_a_cluster_worker(config, comments, model) -> int:
    """Send ``comments`` to their partitions and run one in-process worker in cluster mode until all are judged."""
    raw = worker_connect(config.redis_url, cluster=True, client_name="seawall-test-fill")
    try:
        pipe = raw.pipeline(transaction=False)
        for c in comments:
            send_comment(raw, config.keys, c, pipeline=pipe)
        pipe.execute()
        consumer = build_consumer(config, source=StaticModelSource(model=model), consumer="fill", client=raw)
        consumer.prepare()
        written = 0

        def step() -> int:
            nonlocal written
            written += consumer.step().written
            return written

        # step until every comment is written; fail only if nothing moves for 30 s (leases, a slow machine)
        wait_for_progress(lambda: step() >= len(comments), lambda: written, stall_s=30.0, interval=0.0,
                          what=f"{len(comments)} comments through the in-process worker")
        return written
    finally:
        raw.close()


def test_console_watch_feedback_and_rescore_read_six_partitions_on_a_cluster(shared_cluster):
    config = load_config({"redis_url": shared_cluster.url, "redis.cluster": True, "keys.partitions": 6,
                          "console.undo_s": 0.2, "worker.batch": 256, "worker.block_ms": 10,
                          "worker.site_thresholds": {SITE: {"hold": 0.0, "reject": 1.0}}}, environ={})
    keys = config.keys
    path, _version = tiny_model(1)
    comments = [{"id": f"k{i}", "text": t, "site": SITE, "author": f"member-{i % 7}"}
                for i, (t, _y) in enumerate(invented_comments(N, seed=5))]
    assert fill_through_a_cluster_worker(config, comments, load_model(path.read_bytes())) == N
    client = connect(config)
    per_partition = [client.zcard(p.held) for p in keys.parts]
    assert sum(per_partition) == N and all(per_partition), per_partition
    # the six hold queues really live on three different primaries
    assert len({shared_cluster.primary_of(key_slot(p.held)).address for p in keys.parts}) == 3

    snap = collect(client, keys)  # `seawall watch`: every partition's per-minute counts, summed
    assert sum(sum(row.totals) for row in snap.sites) == N and [row.site for row in snap.sites] == [SITE]

    with two_moderators(client, config) as (ana, bo):
        res, page = ana.request("GET", "/queue?view=list")
        assert res.status == 200 and page.count(b'class="row ') == N  # one queue over six partitions
        newest = race_two_moderators(client, keys, ana, bo)

    decided = Counter(e["id"] for e in _stream(client, keys.decisions))
    assert set(decided) == set(newest) and set(decided.values()) == {1}
    assert FeedbackConsumer(client=client, keys=keys, clock=time.time).drain() == 12
    stored = {r.id: r.label for _sid, r in scan_labels(client, keys)}
    assert stored == {**{i: "spam" for i in newest[:8]}, **{i: "ham" for i in newest[8:12]}}

    counts = rescore_held(client, keys, load_model(tiny_model(2)[0].read_bytes()))
    assert counts["held"] == counts["rescored"] == N - 12
    assert held_count(client, keys) == N - 12 - counts["released"]
    client.close()
