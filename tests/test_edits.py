"""Edited comments: the same id with the same text is skipped, with another text it gets a verdict of its own.

The commit script runs on fakeredis and on a real redis-server (the same Lua).  The worker-kill
test for edits is in tests/test_faults_edits.py.
"""
from __future__ import annotations

import fakeredis
import pytest

from scorers import WordScorer
from worker.commit import text_digest
from worker.connection import raw_stream_replies
from worker.consumer import StreamConsumer
from worker.redistransport import redis_consumer
from worker.loader import StaticModelSource
from worker.settings import Keys, WorkerSettings

KEYS = Keys()


@pytest.fixture(params=["fakeredis", "redis-server"])
def client(request):
    if request.param == "fakeredis":
        return raw_stream_replies(fakeredis.FakeRedis(server=fakeredis.FakeServer()))
    return raw_stream_replies(request.getfixturevalue("redis_client"))


def worker(client, **settings) -> StreamConsumer:
    c = redis_consumer(client=client, keys=KEYS,
                       settings=WorkerSettings(block_ms=5, overlap_commit=False, hold_floor=0.0, reject_floor=0.0,
                                               **settings),
                       model_source=StaticModelSource(model=WordScorer()), consumer="w")
    c.prepare()
    return c


def send(client, comment_id: str, text: str, site: str = "a.example"):
    return client.xadd(KEYS.comments, {"id": comment_id, "text": text, "site": site})


def verdicts(client) -> list[dict]:
    return [{k.decode(): v.decode() for k, v in f.items()} for _sid, f in client.xrange(KEYS.verdicts)]


def drain(c: StreamConsumer, rounds: int = 5) -> None:
    for _ in range(rounds):
        c.step()


def held(client) -> list[str]:
    return sorted(m.decode() for m in client.zrange(KEYS.held, 0, -1))


def test_same_id_and_text_is_skipped_and_a_changed_text_is_a_new_version(client):
    w = worker(client)
    original = "Lovely evening at the harbour with everyone"
    edited = "Lovely evening at the harbour, free casino bonus click"
    send(client, "c1", original)
    drain(w)
    send(client, "c1", original)          # a producer's retry: no second verdict
    send(client, "c1", edited)            # an edit: a verdict of its own
    send(client, "c1", edited)            # the edit's retry
    drain(w)
    got = verdicts(client)
    assert [(v["id"], v["version"], v["digest"], v.get("edit")) for v in got] == [
        ("c1", "1", text_digest(original), None), ("c1", "2", text_digest(edited), "1")]
    assert (got[0]["action"], got[1]["action"]) == ("publish", "hold")
    assert client.hget(KEYS.text("c1"), "text").decode() == edited    # the cache holds the latest text
    assert client.hget(KEYS.text("c1"), "version") == b"2"
    assert held(client) == ["c1"]
    assert int(client.execute_command("XPENDING", KEYS.comments, KEYS.group)[0]) == 0


def test_going_back_to_an_earlier_text_gets_no_second_verdict(client):
    w = worker(client)
    for text in ("first words here", "second words here", "first words here", "third words here"):
        send(client, "c1", text)
        drain(w, 2)
    assert [(v["version"], v["digest"]) for v in verdicts(client)] == [
        ("1", text_digest("first words here")), ("2", text_digest("second words here")),
        ("3", text_digest("third words here"))]


def test_several_versions_in_one_batch_and_the_hold_queue_follows_the_latest(client):
    w = worker(client, batch=64)
    send(client, "a", "free casino bonus now")        # held ... (score 1.0 rejects; 0.75 holds)
    send(client, "a", "a friendly note about roses")  # ... then edited into an ordinary comment: leaves the queue
    send(client, "b", "a friendly note about roses")
    send(client, "b", "bonus garden party tonight")   # ordinary, then edited into one that is held
    send(client, "c", "bonus garden party tonight")
    send(client, "c", "a friendly note about roses")
    send(client, "c", "bonus garden party again")     # three versions in one batch
    drain(w, 2)
    got = [(v["id"], v["version"], v["action"]) for v in verdicts(client)]
    assert got == [("a", "1", "reject"), ("a", "2", "publish"), ("b", "1", "publish"), ("b", "2", "hold"),
                   ("c", "1", "hold"), ("c", "2", "publish"), ("c", "3", "hold")]
    assert held(client) == ["b", "c"]


def test_an_edit_that_is_published_releases_an_earlier_hold(client):
    w = worker(client)
    send(client, "c9", "bonus garden party tonight")
    drain(w, 2)
    assert held(client) == ["c9"]
    send(client, "c9", "garden party tonight, all welcome")
    drain(w, 2)
    assert held(client) == [] and verdicts(client)[-1]["edit"] == "1"


def test_a_marker_left_by_an_older_worker_still_means_done(client):
    # Before text versions, done:{id} was a string: that id has its verdict, whatever the text.  The cache
    # it wrote beside it (kept longer) has no markers.
    client.set(KEYS.done("old"), "1-0", ex=60)
    client.hset(KEYS.text("old"), mapping={"text": "some text that was scored before", "site": "a.example"})
    w = worker(client)
    send(client, "old", "some text that was scored before the upgrade")
    send(client, "new", "a comment after the upgrade")
    drain(w, 2)
    assert [v["id"] for v in verdicts(client)] == ["new"]
    assert int(client.execute_command("XPENDING", KEYS.comments, KEYS.group)[0]) == 0


def two_versions_judged(client, **settings):
    """A worker with ``settings`` that has judged two texts of comment c1; the worker."""
    w = worker(client, **settings)
    send(client, "c1", "one text")
    send(client, "c1", "another text")
    drain(w, 2)
    return w


def test_the_cache_marks_every_version_for_as_long_as_it_keeps_the_text(client):
    w = two_versions_judged(client, done_ttl_s=120, text_cache_ttl_s=600)
    cache = {k.decode(): v.decode() for k, v in client.hgetall(KEYS.text("c1")).items()}
    marks = {k: v for k, v in cache.items() if k.startswith("~")}
    assert marks == {"~": "2", "~" + text_digest("one text"): "1", "~" + text_digest("another text"): "2"}
    assert 120 < client.ttl(KEYS.text("c1")) <= 600
    assert not client.exists(KEYS.done("c1"))  # one key per comment, not two
    send(client, "c1", "one text")  # a retried XADD of the first version
    drain(w, 2)
    assert [v["version"] for v in verdicts(client)] == ["1", "2"]


def test_markers_that_must_outlive_the_cached_text_are_kept_in_done_too(client):
    w = two_versions_judged(client, done_ttl_s=600, text_cache_ttl_s=120)
    marker = {k.decode(): v.decode() for k, v in client.hgetall(KEYS.done("c1")).items()}
    assert marker == {text_digest("one text"): "1", text_digest("another text"): "2"}
    assert 120 < client.ttl(KEYS.done("c1")) <= 600
    client.delete(KEYS.text("c1"))  # the text's TTL ran out first
    send(client, "c1", "one text")
    send(client, "c1", "a third text")
    drain(w, 2)
    assert [(v["version"], v["digest"]) for v in verdicts(client)] == [
        ("1", text_digest("one text")), ("2", text_digest("another text")), ("3", text_digest("a third text"))]


def test_a_cache_and_marker_written_by_an_older_worker_still_mean_done(client):
    # Before the markers moved into the cache, done:{id} mapped each judged digest to its version.
    client.hset(KEYS.text("c1"), mapping={"text": "second text", "version": "2", "digest": text_digest("second text")})
    client.hset(KEYS.done("c1"), mapping={text_digest("first text"): "1", text_digest("second text"): "2"})
    w = worker(client)
    for text in ("first text", "second text", "third text"):
        send(client, "c1", text)
    drain(w, 2)
    assert [(v["version"], v["edit"]) for v in verdicts(client)] == [("3", "1")]
    marks = {k.decode(): v.decode() for k, v in client.hgetall(KEYS.text("c1")).items() if k.startswith(b"~")}
    assert marks == {"~": "3", "~" + text_digest("third text"): "3"}