"""The moderators' path over four partitions on a real redis-server: worker, console, decisions, feedback, re-score.

Comments go through a real worker (K = 4, each partition's own stream, hold queue and text cache), the console
serves one merged queue over HTTP, two moderators decide comments from every partition, the feedback consumer
turns the decisions into labels, and a promotion's re-score walks every partition.  The console's and the
helpers' client is wrapped in :class:`slotcheck.SlotChecked`, so every script and transaction they run on the
server is also checked to stay in one Redis Cluster hash slot.
"""
from __future__ import annotations

import json
import time
from collections import Counter

import pytest

from console_kit import race_two_moderators, two_moderators
from ops.bench.console import fill_queue
from ops.config import load_config
from ops.connection import connect
from ops.bench.stream import invented_comments
from ops.registry import load_model
from ops.rescore import rescore_held
from slotcheck import SlotChecked
from worker.feedback import FeedbackConsumer
from worker.holdqueue import held_count
from worker.labels import scan_labels
from worker_models import tiny_model

pytestmark = pytest.mark.redis_server

SITE = "plots.example"
N = 40


def _stream(client, key) -> list[dict[str, str]]:
    return [{k.decode(): v.decode() for k, v in f.items()} for _sid, f in client.xrange(key)]


def test_console_decisions_feedback_and_rescore_over_four_partitions(redis_server):
    config = load_config({"redis_url": redis_server.url, "keys.partitions": 4, "console.undo_s": 0.2},
                         environ={})
    keys = config.keys
    path, _version = tiny_model(1)
    comments = [{"id": f"k{i}", "text": t, "site": SITE, "author": f"member-{i % 7}"}
                for i, (t, _y) in enumerate(invented_comments(N, seed=5))]
    assert fill_queue(redis_server.url, keys, comments, load_model(path.read_bytes()),
                      site_thresholds={SITE: {"hold": 0.0, "reject": 1.0}}) == N
    client = SlotChecked(connect(config))
    per_partition = [client.zcard(p.held) for p in keys.parts]
    assert sum(per_partition) == N and all(per_partition), per_partition  # every partition holds some

    with two_moderators(client, config) as (ana, bo):
        res, page = ana.request("GET", "/queue?view=list")
        assert res.status == 200 and page.count(b'class="row ') == N  # one queue over the four partitions
        res, body = ana.request("GET", "/api/queue/status")
        assert json.loads(body)["held"] == N

        newest = race_two_moderators(client, keys, ana, bo)
        res, body = ana.request("GET", "/api/queue/status")
        assert json.loads(body) | {"now": 0} == {"held": N - 12, "deciding": 0,
                                                 "newest": json.loads(body)["newest"], "now": 0}

    decided = Counter(e["id"] for e in _stream(client, keys.decisions))
    assert set(decided) == set(newest) and set(decided.values()) == {1}
    labels = FeedbackConsumer(client=client, keys=keys, clock=time.time)
    assert labels.drain() == 12
    stored = {r.id: r.label for _sid, r in scan_labels(client, keys)}
    assert stored == {**{i: "spam" for i in newest[:8]}, **{i: "ham" for i in newest[8:12]}}

    counts = rescore_held(client, keys, load_model(tiny_model(2)[0].read_bytes()))
    assert counts["held"] == counts["rescored"] == N - 12
    assert held_count(client, keys) == N - 12 - counts["released"]
    rescored = {f["id"] for p in keys.parts for f in _stream(client, p.verdicts) if f.get("rescored") == "1"}
    assert rescored == {c["id"] for c in comments} - set(newest)
    kinds = {kind for kind, _keys in client.scripts_and_transactions()}
    assert kinds == {"eval", "multi"}  # the checker saw the scripts and transactions, none across slots
