"""Moderators' decisions on held comments (worker/decisions.py) and the hold-queue reader (worker/holdqueue.py).

Unit tests on fakeredis, then races and the feedback consumer on a real redis-server: the first moderator wins,
an undo inside the window puts the comment back, and every decision reaches the feedback and decisions streams
exactly once however many processes finalize.
"""
from __future__ import annotations

import json
import random
import threading

import pytest

from ops.cli import main
from worker import decisions
from worker.feedback import FeedbackConsumer
from worker.labels import scan_labels
from worker.holdqueue import CACHED_FIELDS, parse_held, parse_reasons, read_held, read_held_by_id
from console_kit import NOW, hold
from worker.settings import FeedbackSettings, Keys

KEYS = Keys()


def stream(client, key) -> list[dict[str, str]]:
    return [{k.decode(): v.decode() for k, v in f.items()} for _sid, f in client.xrange(key)]


# -- the hold-queue reader (pure parts first) ------------------------------------------------

def test_parse_held_keeps_a_comment_whose_cache_expired():
    c = parse_held(b"c9", 12.5, [None] * len(CACHED_FIELDS))
    assert (c.id, c.held_at, c.text, c.score, c.reasons, c.rule, c.campaign) == ("c9", 12.5, None, None, (), None, None)


@pytest.mark.parametrize("raw, expected", [
    ('[["free", 1.5], ["the", -0.25]]', (("free", 1.5), ("the", -0.25))),
    ("not json", ()),
    ('{"free": 1}', ()),
    ('[["free"], [1, 2], ["ok", "NaN"], ["x", "1e999"], ["fine", 0.5]]', (("fine", 0.5),)),
    ("", ()),
], ids=["pairs", "junk", "object", "bad-items", "empty"])
def test_parse_reasons(raw, expected):
    assert parse_reasons(raw) == expected


def test_parse_held_reads_rule_and_campaign_when_the_worker_records_them():
    values = dict.fromkeys(CACHED_FIELDS, b"")
    values.update(text=b"hi", score=b"not a number", rule=b"campaign", campaign=b"c42")
    c = parse_held("c1", "7", [values[f] for f in CACHED_FIELDS])
    assert (c.score, c.rule, c.campaign, c.text) == (None, "campaign", "c42", "hi")


def test_read_held_newest_first_with_cached_fields(fake_redis):
    hold(fake_redis, 3)
    got = read_held(fake_redis, KEYS, limit=2)
    assert [c.id for c in got] == ["c2", "c1"]
    assert got[0].site == "plots.example" and got[0].score == pytest.approx(0.7312)
    assert got[0].reasons == (("fence", 0.4), ("allotment", -0.2))
    assert [c.id for c in read_held(fake_redis, KEYS, limit=5, newest_first=False)] == ["c0", "c1", "c2"]
    assert [c.id for c in read_held_by_id(fake_redis, KEYS, ["c1", "gone", "c0"])] == ["c1", "c0"]


@pytest.mark.parametrize("limit", [0, -1, True, 1.5, 10**6], ids=["zero", "negative", "bool", "float", "huge"])
def test_read_held_refuses_bad_limits(fake_redis, limit):
    with pytest.raises(ValueError, match="read_held: limit"):
        read_held(fake_redis, KEYS, limit=limit)


# -- claim, undo, finalize ------------------------------------------------------------

def test_claim_parks_comments_and_reports_the_ones_not_held(fake_redis):
    hold(fake_redis, 3)
    done = decisions.claim(fake_redis, KEYS, ["c0", "c1", "nope", "c0"], action="reject", moderator="mod-ana",
                           now=NOW, undo_s=5)
    assert done.decided == ["c0", "c1"] and done.gone == ["nope"] and done.final_at == NOW + 5
    assert fake_redis.zrange(KEYS.held, 0, -1) == [b"c2"]
    assert fake_redis.zscore(KEYS.deciding, "c0") == NOW + 5
    parked = {k.decode(): v.decode() for k, v in fake_redis.hgetall(KEYS.decision("c0")).items()}
    assert parked["label"] == "spam" and parked["moderator"] == "mod-ana" and parked["held_at"] == str(int(NOW - 1000))
    assert parked["site"] == "plots.example" and parked["score"] == "0.7312" and parked["stream_id"] == "1-0"
    audit = stream(fake_redis, KEYS.audit)
    assert [(a["event"], a["id"], a["moderator"]) for a in audit] == [("decide", "c0", "mod-ana"),
                                                                       ("decide", "c1", "mod-ana")]
    assert fake_redis.xlen(KEYS.feedback) == 0 and fake_redis.xlen(KEYS.decisions) == 0  # not final yet


def test_the_second_moderator_finds_the_comment_gone_and_no_label_is_written_twice(fake_redis):
    hold(fake_redis, 1)
    first = decisions.claim(fake_redis, KEYS, ["c0"], action="reject", moderator="mod-ana", now=NOW, undo_s=0)
    second = decisions.claim(fake_redis, KEYS, ["c0"], action="publish", moderator="mod-bo", now=NOW, undo_s=0)
    assert first.decided == ["c0"] and second.decided == [] and second.gone == ["c0"]
    assert decisions.finalize_due(fake_redis, KEYS, now=NOW) == 1
    assert decisions.finalize_due(fake_redis, KEYS, now=NOW + 60) == 0
    assert stream(fake_redis, KEYS.feedback) == [{"id": "c0", "label": "spam", "moderator": "mod-ana", "reason": "",
                                                  "source": "console"}]
    (entry,) = stream(fake_redis, KEYS.decisions)
    assert entry["decision"] == "reject" and entry["moderator"] == "mod-ana"


def test_decision_entry_has_exactly_the_documented_fields(fake_redis):
    hold(fake_redis, 1)
    decisions.claim(fake_redis, KEYS, ["c0"], action="publish", moderator="mod-ana", now=NOW, undo_s=1,
                    reason="fine, a real member")
    decisions.finalize_due(fake_redis, KEYS, now=NOW + 1)
    (entry,) = stream(fake_redis, KEYS.decisions)
    # the README's table of the decisions stream lists these fields
    assert list(entry) == ["id", "decision", "label", "moderator", "decided_at", "held_at", "score", "model", "site",
                           "rule", "campaign", "stream_id", "reason", "source"]
    assert entry == {"id": "c0", "decision": "publish", "label": "ham", "moderator": "mod-ana",
                     "decided_at": f"{NOW:.3f}", "held_at": str(int(NOW - 1000)), "score": "0.7312", "model": "v1",
                     "site": "plots.example", "rule": "", "campaign": "", "stream_id": "1-0",
                     "reason": "fine, a real member", "source": "console"}
    assert fake_redis.exists(KEYS.decision("c0")) == 0 and fake_redis.zcard(KEYS.deciding) == 0


def test_undo_inside_the_window_puts_the_comment_back_with_its_hold_time(fake_redis):
    hold(fake_redis, 2)
    done = decisions.claim(fake_redis, KEYS, ["c0", "c1"], action="reject", moderator="mod-ana", now=NOW, undo_s=5)
    assert decisions.undo(fake_redis, KEYS, "not-the-token", ["c0"], moderator="mod-ana", now=NOW + 1) == []
    assert decisions.undo(fake_redis, KEYS, done.token, ["c0"], moderator="mod-ana", now=NOW + 1) == ["c0"]
    assert fake_redis.zscore(KEYS.held, "c0") == NOW - 1000
    assert decisions.finalize_due(fake_redis, KEYS, now=NOW + 5) == 1  # only c1 was still decided
    assert decisions.undo(fake_redis, KEYS, done.token, ["c1"], moderator="mod-ana", now=NOW + 6) == []  # too late
    assert [f["id"] for f in stream(fake_redis, KEYS.feedback)] == ["c1"]
    assert [a["event"] for a in stream(fake_redis, KEYS.audit)] == ["decide", "decide", "undo"]


def test_finalize_waits_for_the_window(fake_redis):
    hold(fake_redis, 1)
    decisions.claim(fake_redis, KEYS, ["c0"], action="reject", moderator="mod-ana", now=NOW, undo_s=5)
    assert decisions.finalize_due(fake_redis, KEYS, now=NOW + 4.9) == 0
    assert decisions.finalize(fake_redis, KEYS, ["c0"], now=NOW + 4.9) == []
    assert decisions.finalize_due(fake_redis, KEYS, now=NOW + 5) == 1


@pytest.mark.parametrize("ids, action, moderator, match", [
    ([], "reject", "m", "non-empty list"),
    ("c1", "reject", "m", "non-empty list"),
    (["c1"], "delete", "m", "action must be"),
    (["c1"], "reject", "", "moderator"),
    (["x" * 300], "reject", "m", "longer than 256"),
    ([f"c{i}" for i in range(decisions.MAX_IDS + 1)], "reject", "m", "at most"),
    ([3], "reject", "m", "comment id"),
], ids=["empty", "string", "action", "no-moderator", "long-id", "too-many", "not-str"])
def test_claim_checks_its_arguments_before_touching_redis(ids, action, moderator, match):
    with pytest.raises(ValueError, match=match):
        decisions.claim(None, KEYS, ids, action=action, moderator=moderator, now=NOW, undo_s=5)


def test_label_now_decides_a_held_comment_and_only_labels_others(fake_redis):
    hold(fake_redis, 1)
    first = decisions.label_now(fake_redis, KEYS, "c0", "ham", moderator="mod-kit", now=NOW)
    again = decisions.label_now(fake_redis, KEYS, "c0", "spam", moderator="mod-kit", text="edited text", now=NOW)
    assert first["decided"] is True and again["decided"] is False
    assert fake_redis.zcard(KEYS.held) == 0
    assert stream(fake_redis, KEYS.feedback) == [{"id": "c0", "label": "ham", "moderator": "mod-kit"},
                                                 {"id": "c0", "label": "spam", "moderator": "mod-kit",
                                                  "text": "edited text"}]
    (entry,) = stream(fake_redis, KEYS.decisions)
    assert entry["decision"] == "publish" and entry["source"] == "cli"


# -- against a real redis-server ---------------------------------------------------------

@pytest.mark.redis_server
def test_many_moderators_racing_on_one_queue_decide_each_comment_once(redis_server):
    """8 threads claim the same 300 comments in shuffled orders, two more finalize meanwhile."""
    clients = [redis_server.client() for _ in range(10)]
    ids = hold(clients[0], 300)
    wins: dict[str, list[str]] = {}
    lock = threading.Lock()
    stop = threading.Event()

    def moderator(n: int):
        order = ids[:]
        random.Random(n).shuffle(order)
        for i in range(0, len(order), 7):
            done = decisions.claim(clients[n], KEYS, order[i:i + 7], action="reject", moderator=f"mod-{n}",
                                   now=NOW, undo_s=0)
            with lock:
                for cid in done.decided:
                    wins.setdefault(cid, []).append(f"mod-{n}")

    def finalizer(n: int):
        while not stop.is_set():
            decisions.finalize_due(clients[n], KEYS, now=NOW, batch=13)

    finalizers = [threading.Thread(target=finalizer, args=(n,)) for n in (8, 9)]
    moderators = [threading.Thread(target=moderator, args=(n,)) for n in range(8)]
    for t in finalizers + moderators:
        t.start()
    for t in moderators:
        t.join(timeout=120)
    stop.set()
    for t in finalizers:
        t.join(timeout=60)
    decisions.finalize_due(clients[0], KEYS, now=NOW)
    assert sorted(wins) == sorted(ids) and all(len(w) == 1 for w in wins.values())
    labels = stream(clients[0], KEYS.feedback)
    assert sorted(f["id"] for f in labels) == sorted(ids)  # one label per comment, none twice
    assert {f["id"]: f["moderator"] for f in labels} == {cid: w[0] for cid, w in wins.items()}
    assert clients[0].xlen(KEYS.decisions) == 300 and clients[0].zcard(KEYS.held) == 0
    for c in clients:
        c.close()


@pytest.mark.redis_server
def test_console_labels_reach_the_labelled_store_through_the_feedback_consumer(redis_client):
    hold(redis_client, 4)
    decisions.claim(redis_client, KEYS, ["c0", "c1"], action="reject", moderator="mod-ana", now=NOW, undo_s=0)
    decisions.claim(redis_client, KEYS, ["c2"], action="publish", moderator="mod-bo", now=NOW, undo_s=0)
    decisions.finalize_due(redis_client, KEYS, now=NOW)
    consumer = FeedbackConsumer(client=redis_client, keys=KEYS, consumer="t", settings=FeedbackSettings(block_ms=10))
    assert consumer.drain() == 3
    records = {r.id: r for _sid, r in scan_labels(redis_client, KEYS)}
    assert {cid: (r.label, r.moderator) for cid, r in records.items()} == {
        "c0": ("spam", "mod-ana"), "c1": ("spam", "mod-ana"), "c2": ("ham", "mod-bo")}
    assert records["c0"].text == "comment number 0 about the allotment fence"
    assert redis_client.xlen(KEYS.deadletter) == 0
    assert redis_client.zrange(KEYS.held, 0, -1) == [b"c3"]


@pytest.mark.redis_server
def test_the_feedback_command_decides_a_held_comment_through_the_same_helper(redis_server, redis_client, capsys):
    hold(redis_client, 1)
    assert main(["feedback", "c0", "spam", "--moderator", "mod-ana", "--redis", redis_server.url]) == 0
    assert "it left the hold queue" in capsys.readouterr().out
    assert main(["feedback", "c0", "ham", "--redis", redis_server.url, "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["decided"] is False
    assert redis_client.zcard(KEYS.held) == 0
    assert [e["decision"] for e in stream(redis_client, KEYS.decisions)] == ["reject"]
    assert [f["label"] for f in stream(redis_client, KEYS.feedback)] == ["spam", "ham"]
