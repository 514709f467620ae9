"""The consumer loop on fakeredis (with Lua): one verdict per comment, dead letters, poison,
reclaim, policies, model failures and hot reload, all without a real server."""
from __future__ import annotations

import json
import time

import pytest

from scorers import StandInThresholds, WordScorer
from worker.connection import raw_stream_replies
from worker.redistransport import redis_consumer
from worker.verdicts import format_reasons
from worker.loader import FileModelSource, StaticModelSource
from worker.routing import Decision
from worker.settings import Keys, WorkerSettings

KEYS = Keys()


@pytest.fixture
def client(fake_redis):
    return raw_stream_replies(fake_redis)


class Recorder:
    def __init__(self):
        self.verdicts, self.dead, self.models, self.batches, self.lags = [], [], [], [], []

    def on_batch(self, size, seconds):
        self.batches.append(size)

    def on_verdicts(self, verdicts):
        self.verdicts.extend(verdicts)

    def on_deadletter(self, reason):
        self.dead.append(reason)

    def on_model(self, version, created_at):
        self.models.append(version)

    def on_lag(self, lag, pending, partitions=None):
        self.lags.append((lag, pending))
        self.partitions = partitions

    def on_reconnect(self):
        pass


def make(client, *, name="w1", model=None, observer=None, policies=(), **settings):
    settings.setdefault("block_ms", 5)
    # Inline commits by default: with the commit thread's second connection, fakeredis's
    # blocking read was seen to take ~5 s; one test below runs the commit thread on purpose.
    settings.setdefault("overlap_commit", False)
    # The stand-in's scores are word shares, not probabilities: its own thresholds route them, no floors.
    settings.setdefault("hold_floor", 0.0)
    settings.setdefault("reject_floor", 0.0)
    c = redis_consumer(client=client, keys=KEYS, settings=WorkerSettings(**settings),
                       model_source=StaticModelSource(model=model or WordScorer()), consumer=name,
                       observer=observer, policies=policies)
    c.prepare()
    return c


def send(client, n=1, **fields):
    ids = []
    for i in range(n):
        f = {"id": f"c{i}", "text": "a friendly note about the garden", "site": "a.example"}
        f.update({k: (v.format(i=i) if isinstance(v, str) else v) for k, v in fields.items()})
        ids.append(client.xadd(KEYS.comments, f))
    return ids


def verdicts(client):
    return [{k.decode(): v.decode() for k, v in f.items()} for _id, f in client.xrange(KEYS.verdicts)]


def deadletters(client):
    return [{k.decode(): v.decode() for k, v in f.items()} for _id, f in client.xrange(KEYS.deadletter)]


def pending(client):
    return int(client.execute_command("XPENDING", KEYS.comments, KEYS.group)[0])  # raw reply: [count, min, max, ...]


def drain(consumer, rounds=10):
    for _ in range(rounds):
        consumer.step()


def test_verdict_cache_rates_and_ack_commit_together(client):
    send(client, 1, id="p1", text="a friendly note")
    send(client, 1, id="h1", text="free tickets for the fair tonight")   # 1/6 spam words -> below hold
    send(client, 1, id="h2", text="bonus garden party tonight")           # 1/4 -> hold
    send(client, 1, id="r1", text="free casino bonus", site="b.example")  # 3/3 -> reject
    make(client).step()
    got = {v["id"]: v for v in verdicts(client)}
    assert {i: v["action"] for i, v in got.items()} == {"p1": "publish", "h1": "publish", "h2": "hold", "r1": "reject"}
    assert got["r1"]["score"] == "1.0000" and got["r1"]["model"] == "standin0001" and got["r1"]["site"] == "b.example"
    assert json.loads(got["r1"]["reasons"]) == [["free", 0.3333], ["casino", 0.3333], ["bonus", 0.3333]]
    assert "rescored" not in got["r1"]
    cache = client.hgetall(KEYS.text("h2"))
    assert cache[b"text"] == b"bonus garden party tonight" and cache[b"action"] == b"hold"
    assert json.loads(cache[b"reasons"]) == [["bonus", 0.25]]  # the verdict's reasons, for the console
    assert 0 < client.ttl(KEYS.text("h2")) <= 14 * 86400
    assert client.zrange(KEYS.held, 0, -1) == [b"h2"]
    (rates_key,) = client.keys(KEYS.key("rates", "*"))
    assert client.hgetall(rates_key) == {b"a.example:total": b"3", b"a.example:hold": b"1",
                                         b"b.example:total": b"1", b"b.example:reject": b"1"}
    assert 0 < client.ttl(rates_key) <= 3 * 3600
    assert client.hget(KEYS.text("p1"), "~") == b"1" and not client.exists(KEYS.done("p1"))
    assert pending(client) == 0


def test_bad_entries_are_dead_lettered_and_acked(client):
    client.xadd(KEYS.comments, {"text": "no id"})
    client.xadd(KEYS.comments, {"id": "x1"})
    client.xadd(KEYS.comments, {"id": "x2", "text": b"\xc3\x28"})
    client.xadd(KEYS.comments, {"id": "x3", "text": "y" * 70_000})
    client.xadd(KEYS.comments, {f"f{i}": "v" for i in range(40)})
    client.xadd(KEYS.comments, {"id": "x4", "text": "   "})
    send(client, 1, id="ok", text="fine words")
    rec = Recorder()
    result = make(client, observer=rec).step()
    assert result.written == 1
    reasons = [d["reason"] for d in deadletters(client)]
    assert reasons == ["missing_id", "missing_text", "invalid_utf8", "text_too_large", "too_many_fields", "empty_text"]
    assert rec.dead == reasons
    big = deadletters(client)[3]
    assert big["id"] == "x3" and len(big["text"]) == 1024 and big["truncated"] == "1"
    assert pending(client) == 0


def test_a_comment_id_gets_one_verdict_even_when_sent_twice(client):
    send(client, 3, id="same")
    result = make(client).step()
    assert (result.written, result.duplicates) == (1, 2)
    assert len(verdicts(client)) == 1
    assert pending(client) == 0


def test_two_consumers_committing_the_same_entries_write_once(client):
    """The reclaim race: a slow consumer and the one that took its entries over both finish."""
    send(client, 20, id="c{i}")
    slow, fast = make(client, name="slow"), make(client, name="fast", claim_idle_ms=1)
    entries = slow.source.reader.read_from(b">", block=False)                       # slow reads, then stalls
    assert len(entries) == 20
    client.execute_command("XAUTOCLAIM", KEYS.comments, KEYS.group, "fast", 0, "0-0")   # fast takes them over
    taken = fast.source.reader.read_from(b"0", block=False)
    assert fast.process(taken).written == 20
    late = slow.process(entries)                                 # the slow one finishes too
    assert (late.written, late.duplicates) == (0, 20)
    ids = [v["id"] for v in verdicts(client)]
    assert sorted(ids) == sorted(f"c{i}" for i in range(20)) and len(ids) == 20
    assert pending(client) == 0


def test_xack_guards_even_when_the_marker_is_gone(client):
    send(client, 5, id="c{i}")
    a, b = make(client, name="a"), make(client, name="b")
    entries = a.source.reader.read_from(b">", block=False)
    assert a.process(entries).written == 5
    for i in range(5):
        client.delete(KEYS.text(f"c{i}"))   # e.g. expired, with its markers
    assert b.process(entries).written == 0
    assert len(verdicts(client)) == 5


def test_idle_entries_of_a_dead_consumer_are_reclaimed(client):
    send(client, 7, id="c{i}")
    dead = make(client, name="dead")
    assert len(dead.source.reader.read_from(b">", block=False)) == 7                # read, then the process dies
    alive = make(client, name="alive", claim_idle_ms=1, claim_every_s=0.01)
    time.sleep(0.01)                                             # idle longer than claim_idle_ms
    result = alive.reclaim()
    assert result.written == 7
    assert pending(client) == 0


def test_entries_delivered_too_often_are_poison(client):
    send(client, 2, id="c{i}")
    w = make(client, max_deliveries=3)
    w.source.reader.read_from(b">", block=False)
    for _ in range(3):                                           # the worker "crashed" on them 3 more times
        w.source.reader.read_from(b"0", block=False)
    result = w.process(w.source.reader.read_from(b"0", block=False), deliveries=w.source.reader.deliveries([e for e, _ in
                       client.xrange(KEYS.comments)]))
    assert result.dead == {"poison": 2}
    dl = deadletters(client)
    assert [d["reason"] for d in dl] == ["poison", "poison"]
    assert dl[0]["id"] == "c0" and "delivered 5 times" in dl[0]["detail"]
    assert verdicts(client) == [] and pending(client) == 0


def test_own_backlog_is_read_first_after_a_restart(client):
    send(client, 5, id="c{i}")
    first = make(client, name="w1", batch=2)
    first.source.reader.read_from(b">", block=False)                                # read 2 and died
    again = make(client, name="w1", batch=2)                     # same consumer name restarts
    drain(again)
    assert sorted(v["id"] for v in verdicts(client)) == [f"c{i}" for i in range(5)]
    assert pending(client) == 0


def test_a_failing_model_call_is_isolated_to_the_comment(client):
    send(client, 1, id="ok1", text="nice roses")
    send(client, 1, id="bad", text="this one explodes")
    send(client, 1, id="ok2", text="free bonus")
    model = WordScorer(fail_on="explodes")
    result = make(client, model=model).step()
    assert result.written == 2 and result.dead == {"score_error": 1}
    (dl,) = deadletters(client)
    assert dl["id"] == "bad" and dl["text"] == "this one explodes" and "RuntimeError" in dl["detail"]


class NaNScorer(WordScorer):
    def score_many(self, texts, *, top_k=5, spamward_from=None):
        scores, reasons = super().score_many(texts, top_k=top_k)
        scores[0] = float("nan")
        return scores, reasons


def test_out_of_range_scores_are_dead_lettered_not_published(client):
    send(client, 2, id="c{i}", text="note {i}")
    result = make(client, model=NaNScorer()).step()
    assert result.written == 1 and result.dead == {"score_error": 1}


class CountingScorer(WordScorer):
    def __init__(self):
        super().__init__()
        self.texts = []

    def score_many(self, texts, *, top_k=5, spamward_from=None):
        self.texts.append(list(texts))
        return super().score_many(texts, top_k=top_k)


def test_the_whole_batch_is_scored_in_one_model_call_each_distinct_text_once(client):
    send(client, 50, id="c{i}", text="note number {i} about bonus roses")
    send(client, 10, id="d{i}", text="free casino bonus")        # a wave: ten copies of one text
    model = CountingScorer()
    make(client, model=model, batch=64).step()
    assert len(model.texts) == 1 and len(model.texts[0]) == 51
    got = {v["id"]: v for v in verdicts(client)}
    assert len(got) == 60
    assert {got[f"d{i}"]["action"] for i in range(10)} == {"reject"}
    assert got["c7"]["score"] == "0.1667" and got["d3"]["score"] == "1.0000"


class HoldEverything:
    def apply(self, client, comments, scores, decisions):
        return [Decision("hold", "campaign", "camp-1") if c.site == "a.example" else d
                for c, d in zip(comments, decisions)]


class Broken:
    def apply(self, client, comments, scores, actions):
        raise KeyError("bug")


class Malformed:
    def apply(self, client, comments, scores, actions):
        return ["explode"] * len(actions)


def test_policies_adjust_actions_and_broken_ones_are_ignored(client):
    send(client, 2, id="c{i}")
    send(client, 1, id="other", site="b.example")
    make(client, policies=[Broken(), HoldEverything(), Malformed()]).step()
    got = {v["id"]: v for v in verdicts(client)}
    assert {i: v["action"] for i, v in got.items()} == {"c0": "hold", "c1": "hold", "other": "publish"}
    assert {i: (v["rule"], v.get("campaign")) for i, v in got.items()} == {
        "c0": ("campaign", "camp-1"), "c1": ("campaign", "camp-1"), "other": ("model", None)}
    assert sorted(client.zrange(KEYS.held, 0, -1)) == [b"c0", b"c1"]


def test_site_thresholds_from_settings(client):
    send(client, 1, id="s1", text="free garden tools here today", site="strict.example")   # 0.2 -> hold by model
    send(client, 1, id="s2", text="free garden tools here today", site="lax.example")
    make(client, site_thresholds={"strict.example": {"reject": 0.15}, "lax.example": {"hold": 0.5}}).step()
    assert {v["id"]: v["action"] for v in verdicts(client)} == {"s1": "reject", "s2": "publish"}


def test_observer_sees_verdicts_with_latency(client):
    send(client, 3, id="c{i}")
    rec = Recorder()
    make(client, observer=rec).step()
    assert [v["id"] for v in rec.verdicts] == ["c0", "c1", "c2"]
    assert all(v["latency_s"] >= 0 and v["action"] == "publish" for v in rec.verdicts)
    assert rec.models == ["standin0001"] and rec.batches == [3]
    assert rec.lags == [(3, 0)]                                  # reported before the read: 3 waiting, none pending
    assert rec.partitions == 1                                   # K = 1: the one stream


def test_verdicts_stream_is_capped(client):
    send(client, 300, id="c{i}")
    drain(make(client, verdicts_maxlen=10, batch=100), rounds=4)
    # MAXLEN ~ trims whole nodes: the cap is approximate but it holds well below 300.
    assert client.xlen(KEYS.verdicts) < 300


def test_reasons_json_is_compact_and_rounded():
    assert format_reasons([("<url>", 0.123456), ("free", -0.5)]) == '[["<url>",0.1235],["free",-0.5000]]'
    odd = format_reasons([('say "hi"\n', float("nan")), ("é", float("-inf")), ("x", 1e-9)])
    assert json.loads(odd) == [['say "hi"\n', 0.0], ["é", 0.0], ["x", 0.0]] and odd.isascii()


def test_an_empty_read_does_nothing(client):
    result = make(client).step()
    assert result.read == 0 and verdicts(client) == []


def test_group_is_created_with_mkstream_and_keeps_earlier_entries(client):
    send(client, 2, id="c{i}")                                   # sent before any worker existed
    drain(make(client))
    assert len(verdicts(client)) == 2


def test_backoff_is_capped_exponential(client):
    c = make(client, backoff_base_s=0.1, backoff_factor=2.0, backoff_cap_s=1.0)
    assert [round(c.backoff(n), 3) for n in range(1, 7)] == [0.1, 0.2, 0.4, 0.8, 1.0, 1.0]


@pytest.mark.parametrize("field,value", [("batch", 0), ("max_deliveries", 0), ("backoff_factor", 0.5), ("block_ms", "x")],
                         ids=["batch-zero", "no-deliveries", "shrinking-backoff", "string"])
def test_bad_settings_name_the_field(field, value):
    with pytest.raises(ValueError, match=field):
        WorkerSettings(**{field: value})


def test_hot_reload_from_file_and_corrupt_file_refused(client, tmp_path):
    path = tmp_path / "model.bin"
    path.write_text("v1")

    def loader(p):
        text = open(p).read()
        if not text.startswith("v"):
            from model.errors import ArtifactError
            raise ArtifactError("load model: bad checksum")
        return WordScorer(version=text, thresholds=StandInThresholds())

    rec = Recorder()
    c = redis_consumer(client=client, keys=KEYS, settings=WorkerSettings(block_ms=5, reload_poll_s=0.01),
                       model_source=FileModelSource(path=path, loader=loader), consumer="w", observer=rec)
    c.prepare()
    send(client, 1, id="a")
    c.step()
    (tmp_path / "new").write_text("garbage")
    (tmp_path / "new").replace(path)
    c._next_reload = 0
    send(client, 1, id="b")
    c.step()
    (tmp_path / "new").write_text("v2")
    (tmp_path / "new").replace(path)
    c._next_reload = 0
    send(client, 1, id="c")
    c.step()
    assert [(v["id"], v["model"]) for v in verdicts(client)] == [("a", "v1"), ("b", "v1"), ("c", "v2")]
    assert rec.models == ["v1", "v2"]


def test_stop_ends_run_after_the_batch(client):
    send(client, 3, id="c{i}")

    class StopAfterBatch(Recorder):
        def on_batch(self, size, seconds):
            consumer.stop()

    consumer = make(client, observer=StopAfterBatch())
    assert consumer.run() == 0
    assert len(verdicts(client)) == 3 and pending(client) == 0


def test_a_refused_commit_backs_off_and_the_batch_stays_pending(client):
    """A key of the wrong type (or OOM) makes Redis refuse the script: nothing is lost, the loop retries."""
    send(client, 2, id="c{i}")
    client.set(KEYS.verdicts, "not a stream")
    sleeps = []

    c = redis_consumer(client=client, keys=KEYS,
                       settings=WorkerSettings(block_ms=5, backoff_base_s=0.25, overlap_commit=False),
                       model_source=StaticModelSource(model=WordScorer()), consumer="w")

    def sleep(seconds):
        sleeps.append(seconds)
        client.delete(KEYS.verdicts)                              # the operator fixes it
        if len(sleeps) > 1:
            c.stop()

    c._sleep = sleep
    original_step = c.step

    def step(**kwargs):
        result = original_step(**kwargs)
        if client.exists(KEYS.verdicts) and client.type(KEYS.verdicts) == b"stream":
            c.stop()
        return result

    c.step = step
    assert c.run() == 0
    assert sleeps[0] == 0.25
    assert sorted(v["id"] for v in verdicts(client)) == ["c0", "c1"] and pending(client) == 0


@pytest.mark.parametrize("overlap", [True, False], ids=["commit-thread", "inline"])
def test_run_commits_every_batch_with_or_without_the_commit_thread(client, overlap):
    send(client, 500, id="c{i}", text="note {i} about the garden")

    class StopWhenDone(Recorder):
        def on_verdicts(self, verdicts):
            super().on_verdicts(verdicts)
            if len(self.verdicts) == 500:
                consumer.stop()

    rec = StopWhenDone()
    consumer = make(client, observer=rec, batch=64, overlap_commit=overlap)
    assert consumer.run() == 0
    assert sorted(v["id"] for v in rec.verdicts) == sorted(f"c{i}" for i in range(500))
    assert len(verdicts(client)) == 500 and pending(client) == 0


def test_the_commit_script_takes_flags_not_action_names_and_keeps_any_text(client):
    from worker.commit import COMMIT_LUA, COUNT_FLAG, HOLD_FLAG, action_flags

    for name in ("publish", "hold", "reject"):
        assert f"'{name}'" not in COMMIT_LUA and f'"{name}"' not in COMMIT_LUA
    assert (action_flags("publish"), action_flags("hold"), action_flags("reject")) == (0, HOLD_FLAG | COUNT_FLAG,
                                                                                       COUNT_FLAG)
    # Quotes, backslashes, a JSON-looking text, accents and an emoji survive the one JSON argument as they are.
    texts = ['she said "free" \\ not \\"free\\"', '[1, {"a": null}]', "café au lait près du pont 🌉 bonus garden"]
    for i, text in enumerate(texts):
        client.xadd(KEYS.comments, {"id": f"t{i}", "text": text, "site": "a.example", "author": "Zoë"})
    client.xadd(KEYS.comments, {"id": "d1", "site": "a.example", "note": "ünïcode \"quoted\""})  # no text: dead letter
    make(client).step()
    for i, text in enumerate(texts):
        assert client.hget(KEYS.text(f"t{i}"), "text").decode() == text
        assert client.hget(KEYS.text(f"t{i}"), "author").decode() == "Zoë"
    (dead,) = deadletters(client)
    assert dead["note"] == 'ünïcode "quoted"' and dead["id"] == "d1"
    assert pending(client) == 0
