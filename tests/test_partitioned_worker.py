"""The data plane over K partitions (fakeredis): commit per partition, a source over partitions, the producer helper."""
from __future__ import annotations

import pytest

from kit import wait_until

from scorers import WordScorer
from worker.commit import BatchCommitter, Limits as CommitLimits, Scored, WRITTEN
from worker.connection import raw_stream_replies
from worker.loader import StaticModelSource
from worker.partitions import key_slot, send_comment, stream_key
from worker.redistransport import RedisStreamSource, redis_consumer
from worker.settings import Keys, WorkerSettings
from worker.transport import Batch
from worker.validation import Comment

KEYS = Keys(partitions=4)
SETTINGS = WorkerSettings(block_ms=5, overlap_commit=False, hold_floor=0.0, reject_floor=0.0, batch=64)


def verdict_ids(client, keys=KEYS) -> list[str]:
    return [f[b"id"].decode() for part in keys.parts for _, f in client.xrange(part.verdicts)]


def test_send_comment_puts_each_comment_on_its_partitions_stream(fake_redis):
    for i in range(40):
        send_comment(fake_redis, KEYS, {"id": f"c{i}", "text": "hello"})
    for part in KEYS.parts:
        ids = [f[b"id"].decode() for _, f in fake_redis.xrange(part.comments)]
        assert ids and all(KEYS.partition_of(i) == part.index for i in ids)
    assert sum(fake_redis.xlen(p.comments) for p in KEYS.parts) == 40


def test_send_comment_queues_on_a_pipeline_and_takes_bytes(fake_redis):
    pipe = fake_redis.pipeline(transaction=False)
    assert send_comment(fake_redis, KEYS, {b"id": b"c7", b"text": b"hi"}, pipeline=pipe) is None
    assert fake_redis.xlen(stream_key(KEYS, "c7")) == 0  # queued, not sent
    pipe.execute()
    assert fake_redis.xlen(stream_key(KEYS, "c7")) == 1


@pytest.mark.parametrize("fields, match", [({"text": "no id"}, "need a non-empty 'id'"), ({"id": ""}, "'id'"),
                                           ({"id": 5}, "'id'")], ids=["missing", "empty", "not-text"])
def test_send_comment_checks_its_arguments_first(fake_redis, fields, match):
    with pytest.raises(ValueError, match=match):
        send_comment(fake_redis, KEYS, fields)
    assert fake_redis.dbsize() == 0


def test_the_commit_of_a_partition_names_only_that_partitions_keys():
    committer = BatchCommitter(keys=KEYS, limits=CommitLimits.from_settings(SETTINGS))
    ids = [f"c{i}" for i in range(30) if KEYS.partition_of(f"c{i}") == 2]
    scored = [Scored(Comment(stream_id=f"{1000 + n}-0", id=cid, text="t", site="s"), "0.1", "publish", "[]")
              for n, cid in enumerate(ids)]
    names, _ = committer.arguments(scored, [], model="m", now=1_700_000_000.0, consumer="w", partition=2)
    assert {key_slot(n) for n in names} == {key_slot(KEYS.part(2).tag)}
    assert names[0] == KEYS.part(2).comments
    other = next(f"c{i}" for i in range(30) if KEYS.partition_of(f"c{i}") != 2)
    with pytest.raises(ValueError, match="belongs to partition"):
        committer.arguments([Scored(Comment(stream_id="1-0", id=other, text="t", site="s"), "0.1", "publish", "[]")],
                            [], model="m", now=1.0, consumer="w", partition=2)


def test_a_commit_without_a_partition_is_split_by_comment_id(fake_redis):
    """The RabbitMQ path: no partition of origin, so each comment goes to its own partition's keys."""
    committer = BatchCommitter(keys=KEYS, limits=CommitLimits.from_settings(SETTINGS), acknowledges=False,
                               source="queue")
    scored = [Scored(Comment(stream_id=f"{1000 + i}-0", id=f"c{i}", text="t", site="s"), "0.1", "hold", "[]")
              for i in range(12)]
    codes = committer.commit(fake_redis, scored, [], model="m", now=1_700_000_000.0, consumer="", partition=None)
    assert codes == [WRITTEN] * 12
    for part in KEYS.parts:
        held = {m.decode() for m in fake_redis.zrange(part.held, 0, -1)}
        assert held == {f"c{i}" for i in range(12) if KEYS.partition_of(f"c{i}") == part.index}
        assert all(fake_redis.hget(part.text(i), "~") == b"1" for i in held)
    again = committer.commit(fake_redis, scored, [], model="m", now=1_700_000_001.0, consumer="", partition=None)
    assert again == [0] * 12


def test_a_worker_reads_every_partition_and_commits_each_comment_once(fake_redis):
    client = raw_stream_replies(fake_redis)
    for i in range(100):
        send_comment(client, KEYS, {"id": f"c{i}", "text": "free casino bonus" if i % 3 == 0 else "lunch at noon",
                                    "site": "a.example"})
    w = redis_consumer(client=client, keys=KEYS, settings=SETTINGS,
                       model_source=StaticModelSource(model=WordScorer()), consumer="w")
    w.prepare()
    seen = []
    for _ in range(20):  # bounded: 4 partitions of about 25 entries, batches of 64
        batch = w.source.read(block=False)
        if not batch.entries:
            break
        assert {KEYS.partition_of(f[1].decode()) for e in batch.entries for f in e.fields if f[0] == b"id"} == {
            batch.partition}
        seen.append(batch.partition)
        w.process_batch(batch)
    assert sorted(seen) == [0, 1, 2, 3]  # one batch per partition, each read once
    assert sorted(verdict_ids(fake_redis)) == sorted(f"c{i}" for i in range(100))
    rates = [fake_redis.hgetall(p.rates(int(w.clock() // 60))) for p in KEYS.parts]
    assert sum(int(r.get(b"a.example:total", 0)) for r in rates) == 100
    assert w.source.lag().pending == 0


def test_a_comment_on_the_wrong_partition_is_dead_lettered_there_never_lost(fake_redis):
    client = raw_stream_replies(fake_redis)
    stray = next(f"x{i}" for i in range(50) if KEYS.partition_of(f"x{i}") != 1)
    client.xadd(KEYS.part(1).comments, {"id": stray, "text": "hello"})  # a producer's mistake
    good = next(f"x{i}" for i in range(50) if KEYS.partition_of(f"x{i}") == 1)
    client.xadd(KEYS.part(1).comments, {"id": good, "text": "hello"})
    w = redis_consumer(client=client, keys=KEYS, settings=SETTINGS,
                       model_source=StaticModelSource(model=WordScorer()), consumer="w")
    w.prepare()
    result = w.process_batch(w.source.read(block=False))
    assert (result.written, result.dead) == (1, {"wrong_partition": 1})
    [(_, dead)] = fake_redis.xrange(KEYS.part(1).deadletter)
    assert dead[b"reason"] == b"wrong_partition" and dead[b"id"] == stray.encode()
    assert dead[b"source"] == KEYS.part(1).comments.encode()
    assert verdict_ids(fake_redis) == [good]
    assert w.source.lag().pending == 0  # both acknowledged


def test_claims_come_partition_by_partition(fake_redis):
    client = raw_stream_replies(fake_redis)
    for i in range(20):
        send_comment(client, KEYS, {"id": f"c{i}", "text": "hello"})
    settings = WorkerSettings(block_ms=5, overlap_commit=False, batch=64, claim_idle_ms=1)
    dead = RedisStreamSource(client=client, keys=KEYS, settings=settings, consumer="dead")
    dead.prepare()
    for _ in range(4):
        dead.read(block=False)  # read everything, then "die"
    alive = RedisStreamSource(client=client, keys=KEYS, settings=settings, consumer="alive")
    alive.prepare()
    # once every entry has been idle past claim_idle_ms (XPENDING rows: id, consumer, idle ms, deliveries), one
    # claim round takes them all over (claiming earlier would take some now and, 1 ms later, take them again
    # from "alive" itself)
    assert wait_until(lambda: all(int(row[2]) >= 2 for part in KEYS.parts
                                  for row in fake_redis.xpending_range(part.comments, KEYS.group, "-", "+", 100)),
                      timeout=5, interval=0.002)
    batches = list(alive.claim())
    assert sorted(b.partition for b in batches) == [0, 1, 2, 3] and all(b.claimed for b in batches)
    assert sum(len(b.entries) for b in batches) == 20


def test_one_partition_reads_as_a_single_stream_always_did(fake_redis):
    client = raw_stream_replies(fake_redis)
    keys = Keys()
    send_comment(client, keys, {"id": "c1", "text": "hello"})
    assert client.xlen("seawall:comments") == 1
    source = RedisStreamSource(client=client, keys=keys, settings=SETTINGS, consumer="w")
    source.prepare()
    batch = source.read(block=False)
    assert (len(batch.entries), batch.partition, source.held) == (1, 0, (0,))
    assert isinstance(source.read(block=True), Batch)
