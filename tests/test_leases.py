"""Partition leases (fakeredis, on one invented clock that both the workers and the server's TTLs follow)."""
from __future__ import annotations

import types

import pytest

from worker.leases import Leases, fair_share
from worker.settings import Keys

LEASE_MS = 3_000


class Clock:
    def __init__(self, t: float = 1_800_000_000.0):
        self.t = t

    def __call__(self) -> float:
        return self.t

    def advance(self, seconds: float) -> None:
        self.t += seconds


@pytest.fixture
def clock(monkeypatch):
    """One clock for the workers and for fakeredis's expiry of keys (its command loop reads ``time.time()``)."""
    import fakeredis._socket._base as base

    c = Clock()
    assert hasattr(base, "time"), "fakeredis moved its clock; adapt this fixture"
    monkeypatch.setattr(base, "time", types.SimpleNamespace(time=c))
    return c


def worker(fake_redis, clock, name: str, k: int = 4) -> Leases:
    return Leases(client=fake_redis, keys=Keys(partitions=k), consumer=name, lease_ms=LEASE_MS, clock=clock)


def round_of(clock, *workers, seconds: float | None = None) -> None:
    """Every worker renews once, then the clock moves on by one renewal interval."""
    for w in workers:
        w.tick()
    clock.advance(seconds if seconds is not None else workers[0].interval_s)


def settle(clock, *workers, rounds: int = 6) -> None:
    for _ in range(rounds):
        round_of(clock, *workers)


def owners(fake_redis, k: int = 4) -> dict[int, str]:
    keys = Keys(partitions=k)
    return {p: (v.decode() if v else None) for p in range(k) for v in [fake_redis.get(keys.part(p).lease)]}


def assert_each_partition_has_one_reader(k: int, *workers) -> None:
    held = [p for w in workers for p in w.held]
    assert sorted(held) == list(range(k)), {w.consumer: w.held for w in workers}


def test_fair_share_is_the_ceiling_of_k_over_live_workers():
    assert [fair_share(6, n) for n in (0, 1, 2, 3, 4, 6, 7)] == [6, 6, 3, 2, 2, 1, 1]


def test_a_lone_worker_takes_every_partition(fake_redis, clock):
    a = worker(fake_redis, clock, "a")
    assert a.tick() == (0, 1, 2, 3)
    assert set(owners(fake_redis).values()) == {"a"}
    assert fake_redis.pttl(Keys(partitions=4).part(0).lease) == LEASE_MS


def test_two_workers_split_four_partitions_and_keep_them(fake_redis, clock):
    a, b = worker(fake_redis, clock, "a"), worker(fake_redis, clock, "b")
    settle(clock, a, b)
    assert len(a.held) == len(b.held) == 2
    assert_each_partition_has_one_reader(4, a, b)
    before = owners(fake_redis)
    settle(clock, a, b, rounds=10)  # many lease lengths: renewed, never moved
    assert owners(fake_redis) == before


def test_a_new_worker_makes_the_others_give_back_their_extras(fake_redis, clock):
    a, b = worker(fake_redis, clock, "a", k=6), worker(fake_redis, clock, "b", k=6)
    settle(clock, a, b)
    assert (len(a.held), len(b.held)) == (3, 3)
    c = worker(fake_redis, clock, "c", k=6)
    settle(clock, a, b, c)
    assert sorted(len(w.held) for w in (a, b, c)) == [2, 2, 2]
    assert_each_partition_has_one_reader(6, a, b, c)


def test_a_dead_workers_partitions_move_within_the_lease_time(fake_redis, clock):
    a, b, c = (worker(fake_redis, clock, n, k=6) for n in "abc")
    settle(clock, a, b, c)
    dead = set(c.held)
    assert len(dead) == 2
    # c stops renewing; within one lease length plus a renewal or two, a and b hold everything.
    rounds = 0
    while set(a.held) | set(b.held) != set(range(6)):
        round_of(clock, a, b)
        rounds += 1
        assert rounds <= 2 * 3 + 3, "the dead worker's partitions never moved"
    assert (len(a.held), len(b.held)) == (3, 3)
    assert_each_partition_has_one_reader(6, a, b)
    assert fake_redis.zscore(Keys(partitions=6).members, "c") is None  # its heartbeat ran out: removed


def test_a_worker_that_lost_its_lease_stops_reading_that_partition(fake_redis, clock):
    a = worker(fake_redis, clock, "a", k=2)
    assert a.tick() == (0, 1)
    clock.advance(LEASE_MS / 1000 + 1)  # a was paused past its lease
    b = worker(fake_redis, clock, "b", k=2)
    assert b.tick(force=True)  # b takes what ran out (a's heartbeat ran out too: b is alone)
    assert a.tick() == ()  # a finds both leases gone to b and drops them, then sees two live workers
    assert set(owners(fake_redis, 2).values()) == {"b"}


def test_stopping_gives_the_partitions_back_at_once(fake_redis, clock):
    a, b = worker(fake_redis, clock, "a"), worker(fake_redis, clock, "b")
    settle(clock, a, b)
    a.release_all()
    assert a.held == [] and fake_redis.zscore(Keys(partitions=4).members, "a") is None
    b.tick(force=True)
    assert b.held == [0, 1, 2, 3]


def test_leases_check_their_arguments(fake_redis):
    with pytest.raises(ValueError, match="Leases: consumer"):
        Leases(client=fake_redis, keys=Keys(partitions=2), consumer="", lease_ms=1000)
    with pytest.raises(ValueError, match="Leases: lease_ms"):
        Leases(client=fake_redis, keys=Keys(partitions=2), consumer="a", lease_ms=1.5)


def test_a_source_reads_only_the_partitions_it_holds(fake_redis, clock):
    from worker.connection import raw_stream_replies
    from worker.partitions import send_comment
    from worker.redistransport import RedisStreamSource
    from worker.settings import WorkerSettings

    client = raw_stream_replies(fake_redis)
    keys = Keys(partitions=4)
    settings = WorkerSettings(block_ms=5, batch=100)
    a, b = (RedisStreamSource(client=client, keys=keys, settings=settings, consumer=n,
                              leases=worker(fake_redis, clock, n)) for n in "ab")
    a.prepare()
    assert a.held == (0, 1, 2, 3)  # alone at first
    b.prepare()  # b joins: a gives back two at its next renewal, b takes them at its own
    for _ in range(6):
        clock.advance(a.leases.interval_s)
        a.read(block=False)
        b.read(block=False)
    assert len(a.held) == len(b.held) == 2 and set(a.held) | set(b.held) == {0, 1, 2, 3}
    for i in range(40):
        send_comment(client, keys, {"id": f"c{i}", "text": "hello"})
    seen = {"a": [], "b": []}
    for source in (a, b):
        for _ in range(3):  # bounded: two partitions each, then an empty read
            batch = source.read(block=False)
            if batch.entries:
                seen[source.consumer].append(batch.partition)
    assert sorted(seen["a"]) == list(a.held) and sorted(seen["b"]) == list(b.held)
    a.release()
    assert a.held == () and fake_redis.zscore(keys.members, "a") is None


def test_each_worker_reports_the_partitions_it_holds_and_the_deployment_reports_k(fake_redis, clock):
    """``seawall_partitions_held`` summed over the workers equals ``seawall_partitions`` once the leases settle;
    a worker that stopped reading drops out of the sum (the SeawallPartitionUnread alert)."""
    from prometheus_client import CollectorRegistry

    from ops.config import load_config
    from ops.metrics import PrometheusObserver
    from ops.serving import build_consumer
    from scorers import WordScorer
    from worker.connection import raw_stream_replies
    from worker.loader import StaticModelSource

    config = load_config({"keys.partitions": 4, "worker.block_ms": 5}, environ={})
    client = raw_stream_replies(fake_redis)
    registries, consumers = [], []
    for name in "ab":
        registry = CollectorRegistry()
        registries.append(registry)
        consumers.append(build_consumer(config, source=StaticModelSource(model=WordScorer()), consumer=name,
                                        client=client, policies=(),
                                        observer=PrometheusObserver.for_config(config, registry, clock=clock)))
    for c in consumers:
        c.source.leases.clock = clock
        c.source.prepare()
    for _ in range(6):
        clock.advance(consumers[0].source.leases.interval_s)
        for c in consumers:
            c.source.read(block=False)
            c.report_lag()
    held = [r.get_sample_value("seawall_partitions_held") for r in registries]
    assert held == [2.0, 2.0]
    assert {r.get_sample_value("seawall_partitions") for r in registries} == {4.0}
    consumers[1].source.release()
    consumers[1].report_lag()
    assert registries[1].get_sample_value("seawall_partitions_held") == 0


def test_every_worker_reports_the_group_wide_lag_over_all_partitions(fake_redis, clock):
    """With K > 1 each worker reads only its partitions, yet ``seawall_consumer_lag`` and ``_pending`` are the
    whole group's, as with K = 1: the alert rules, the dashboard and the autoscaler take ``max`` over workers."""
    from worker.connection import raw_stream_replies
    from worker.partitions import send_comment
    from worker.redistransport import RedisStreamSource
    from worker.settings import WorkerSettings
    from worker.transport import Lag

    client = raw_stream_replies(fake_redis)
    keys = Keys(partitions=4)
    settings = WorkerSettings(block_ms=5, batch=5)
    sources = [RedisStreamSource(client=client, keys=keys, settings=settings, consumer=n,
                                 leases=worker(fake_redis, clock, n)) for n in "ab"]
    lone = RedisStreamSource(client=client, keys=Keys(partitions=4), settings=settings, consumer="c",
                             leases=worker(fake_redis, clock, "c"))
    assert lone.lag() == Lag(0, 0, 0)  # nothing sent yet: no stream, no group, nothing created by asking
    assert fake_redis.exists(*(p.comments for p in keys.parts)) == 0
    for s in sources:
        s.prepare()
    for _ in range(6):
        clock.advance(sources[0].leases.interval_s)
        for s in sources:
            s.read(block=False)
    assert [len(s.held) for s in sources] == [2, 2]
    for i in range(40):
        send_comment(client, keys, {"id": f"c{i}", "text": "hello"})
    assert [s.lag() for s in sources] == [Lag(40, 0, 2), Lag(40, 0, 2)]
    delivered = len(sources[0].read(block=False).entries)  # one batch of one of a's partitions, not acknowledged
    assert delivered == 5
    assert [s.lag() for s in sources] == [Lag(35, 5, 2), Lag(35, 5, 2)]
