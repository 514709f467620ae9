"""The worker on a real Redis Cluster (six nodes, tests/servers.py ``RedisCluster``) through faults.

* 2 ``seawall serve`` workers in cluster mode over 6 partitions, 10 SIGKILLs during a 10,000-comment run:
  every comment gets exactly one verdict across the partitions' verdict streams;
* a primary killed with SIGKILL mid-stream: its replica takes over; the test counts what was lost
  (acknowledged writes that never reached the replica) and what a verdict reader saw vanish;
* a partition's slot moved to another primary while serving: nothing lost or doubled;
* a cluster with a password: the worker authenticates with the password in its URL, slot moves included;
* a cluster over TLS (clients, cluster bus and replication): the worker verifies the nodes against the CA.
"""
from __future__ import annotations

import contextlib
import json
import random
import shutil
import threading
import time
from collections import Counter

import pytest
import redis

from faults_kit import (comment_text, doubled as verdicts_beyond_one, kill_mid_batch, kills_on_fresh_backlogs, slice_of,
                        start_workers, tally)
from kit import stop_all, wait_for_progress, wait_until
from servers import RedisCluster, require
from tlscerts import make_ca
from worker.partitions import key_slot, send_comment, stream_key
from worker.settings import Keys

pytestmark = [pytest.mark.redis_server, pytest.mark.slow]

PARTITIONS = 6
KEYS = Keys(partitions=PARTITIONS)
# Cluster mode, 6 partitions, short leases so a dead worker's partitions move fast; kills are the test's doing,
# so an entry caught in several of them is not dead-lettered as poison.
CLUSTER_ENV = {"SEAWALL_REDIS_CLUSTER": "1", "SEAWALL_KEYS_PARTITIONS": str(PARTITIONS),
               "SEAWALL_WORKER_LEASE_MS": "1500", "SEAWALL_WORKER_MAX_DELIVERIES": "1000"}
STALL_S = 60.0
# What a cluster client may raise while a primary fails over or a slot moves.
CLUSTER_TRANSIENT = (redis.RedisError, redis.exceptions.RedisClusterException)


# -- counting across partitions ---------------------------------------------------------------

def _s(value) -> str:
    return value.decode() if isinstance(value, bytes) else str(value)


def read_all(client, stream: str):
    """Every entry of ``stream`` as ``(entry id, fields)``, in pages."""
    last = "-"
    while True:
        rows = client.xrange(stream, min=last, count=5000)
        rows = rows[1:] if last != "-" else rows
        if not rows:
            return
        yield from rows
        last = _s(rows[-1][0])


def verdict_entries(client, keys: Keys = KEYS) -> list[tuple[int, str, str]]:
    """(partition, verdict entry id, comment id) of every verdict of every partition."""
    return [(part.index, _s(sid), _s(fields[b"id"])) for part in keys.parts for sid, fields in
            read_all(client, part.verdicts)]


def verdict_counts(client, keys: Keys = KEYS) -> Counter:
    return Counter(cid for _p, _sid, cid in verdict_entries(client, keys))


def verdict_total(client, keys: Keys = KEYS) -> int:
    return sum(client.xlen(part.verdicts) for part in keys.parts)


def pending_total(client, keys: Keys = KEYS) -> int:
    total = 0
    for part in keys.parts:
        try:
            total += int(client.xpending(part.comments, keys.group)["pending"])
        except redis.ResponseError:  # the group is not made yet
            pass
    return total


def comment_ids(client, keys: Keys = KEYS) -> set[str]:
    """Ids of every comment entry still in the partitions' streams."""
    return {_s(fields[b"id"]) for part in keys.parts for _sid, fields in read_all(client, part.comments)}


def deadletter_count(client, keys: Keys = KEYS) -> int:
    return sum(client.xlen(part.deadletter) for part in keys.parts)


# -- a producer and a verdict reader on the cluster client ----------------------------------------------

class NotReplicated(Exception):
    """WAIT said no replica has the chunk's writes yet."""


class ClusterProducer(threading.Thread):
    """Sends comments ``c<i>`` to their partitions at about ``rate``/s in chunks, surviving failovers.

    A chunk whose pipeline fails is sent again (so an entry may reach its stream twice: the done markers
    keep it to one verdict).  ``accepted_at[id]`` is when the cluster acknowledged the id's XADD.

    With ``wait_ms``, a chunk counts as accepted only once ``WAIT 1 <wait_ms>`` says a replica has it: the
    XADDs for each primary and the WAIT go down one connection to that primary (WAIT counts the writes of
    its own connection), and a chunk WAIT does not confirm is sent again.  ``pad`` lengthens every text.
    """

    def __init__(self, client, *, n: int, rate: float, chunk: int = 50, keys: Keys = KEYS, wait_ms: int = 0,
                 pad: int = 0):
        super().__init__(name="cluster-producer", daemon=True)
        self.client, self.n, self.rate, self.chunk, self.keys = client, n, rate, chunk, keys
        self.wait_ms, self.pad = wait_ms, pad
        self.accepted_at: dict[str, float] = {}
        self.errors = 0
        self.abort = threading.Event()

    def fields(self, k: int) -> dict:
        text = comment_text(k)
        if self.pad:
            text = (text + " " + " ".join(comment_text(k + j) for j in range(1, self.pad // 40 + 2)))[:self.pad]
        return {"id": f"c{k}", "text": text, "site": f"site{k % 3}.example", "author": f"member{k % 97}"}

    def send(self, ids) -> None:
        if not self.wait_ms:
            pipe = self.client.pipeline(transaction=False)
            for k in ids:
                send_comment(self.client, self.keys, self.fields(k), pipeline=pipe)
            pipe.execute()
            return
        by_node: dict[str, tuple] = {}
        for k in ids:
            node = self.client.get_node_from_key(stream_key(self.keys, f"c{k}"))
            by_node.setdefault(node.name, (node, []))[1].append(k)
        try:
            for node, ks in by_node.values():
                direct = self.client.get_redis_connection(node)
                pipe = direct.pipeline(transaction=False)
                for k in ks:
                    send_comment(direct, self.keys, self.fields(k), pipeline=pipe)
                pipe.execute_command("WAIT", 1, self.wait_ms)
                if pipe.execute()[-1] < 1:
                    raise NotReplicated(node.name)
        except (*CLUSTER_TRANSIENT, NotReplicated):
            with contextlib.suppress(*CLUSTER_TRANSIENT):
                self.client.nodes_manager.initialize()  # a failover moved the slots: ask the cluster again
            raise

    def run(self) -> None:
        t0 = time.monotonic()
        i = 0
        while i < self.n and not self.abort.is_set():
            pause = t0 + i / self.rate - time.monotonic()
            if pause > 0:
                time.sleep(pause)
            ids = range(i, min(self.n, i + self.chunk))
            try:
                self.send(ids)
            except (*CLUSTER_TRANSIENT, NotReplicated):
                self.errors += 1
                time.sleep(0.05)
                continue
            now = time.monotonic()
            self.accepted_at.update((f"c{k}", now) for k in ids)
            i += len(ids)


class VerdictReader(threading.Thread):
    """Tails every partition's verdict stream, as a site's consumer of verdicts would; ``seen`` holds
    (partition, entry id, comment id) of every verdict it read."""

    def __init__(self, client, keys: Keys = KEYS):
        super().__init__(name="verdict-reader", daemon=True)
        self.client, self.keys = client, keys
        self.seen: set[tuple[int, str, str]] = set()
        self.stop = threading.Event()

    def run(self) -> None:
        last = {part.index: "0-0" for part in self.keys.parts}
        while not self.stop.is_set():
            for part in self.keys.parts:
                try:
                    rows = self.client.xrange(part.verdicts, min=f"({last[part.index]}", count=1000)
                except CLUSTER_TRANSIENT:
                    time.sleep(0.05)
                    continue
                for sid, fields in rows:
                    self.seen.add((part.index, _s(sid), _s(fields[b"id"])))
                if rows:
                    last[part.index] = _s(rows[-1][0])
            time.sleep(0.02)


def replication_lag_bytes(primary, replica) -> int:
    """How far (replication offset, bytes) ``replica`` is behind ``primary``: INFO replication of each, the
    replica's own offset (the primary's view of it is only refreshed by the replica's once-a-second ACK)."""
    with primary.client(socket_timeout=2) as p, replica.client(socket_timeout=2) as r:
        ahead = int(p.info("replication")["master_repl_offset"])
        behind = int(r.info("replication")["slave_repl_offset"])
    return ahead - behind


def replica_output_bytes(primary_client) -> int:
    """Bytes the primary holds in its own output buffers for its replicas (CLIENT LIST TYPE replica, omem)."""
    text = primary_client.execute_command("CLIENT", "LIST", "TYPE", "replica")
    text = text.decode() if isinstance(text, bytes) else text
    return sum(int(field.split("=", 1)[1]) for line in text.splitlines() for field in line.split()
               if field.startswith("omem="))


def wait_all_judged(client, *, what: str, expected: int | None = None) -> None:
    """Wait (while verdicts keep coming) until every comment in the streams has a verdict and nothing is pending."""
    def done():
        if pending_total(client) != 0:
            return False
        if expected is not None and verdict_total(client) < expected:
            return False
        return comment_ids(client) <= set(verdict_counts(client))

    wait_for_progress(done, lambda: (verdict_total(client), pending_total(client)), stall_s=STALL_S, interval=0.3,
                      what=what)


def judged_after_failover(client, reader) -> tuple[set, Counter]:
    """Once every surviving comment is judged: the verdict entries the promoted primaries hold, and the
    verdicts per comment id (the reader of the verdict streams stopped)."""
    wait_all_judged(client, what="every surviving comment judged (progress: verdicts, pending)")
    reader.stop.set()
    reader.join(timeout=30)
    return set(verdict_entries(client)), verdict_counts(client)


def failover_outcome(producer, reader, final: set, counts: Counter):
    """``(accepted, lost ids, doubled, vanished)`` of a run with a failover: the ids the cluster acknowledged
    and when, those of them with no verdict, verdicts beyond one per id, and the verdicts a reader saw on the
    dead primary that the promoted replica never had (the commit was rolled back whole, so its entry was still
    pending there and got judged again, or the comment itself was lost)."""
    accepted = producer.accepted_at
    return accepted, sorted(set(accepted) - set(counts)), verdicts_beyond_one(counts), sorted(reader.seen - final)


# -- the tests --------------------------------------------------------------------------------------

COMMENTS = 10_000
KILLS = 10


def test_ten_worker_sigkills_on_a_cluster_leave_each_of_10000_comments_exactly_one_verdict(shared_cluster, tmp_path):
    client = shared_cluster.client()
    rng = random.Random(17)
    workers = start_workers(shared_cluster.url, tmp_path, env=CLUSTER_ENV)
    kills = []
    try:
        producer = ClusterProducer(client, n=COMMENTS, rate=1e9)
        for name, held in kills_on_fresh_backlogs(  # a slice of the run before each kill: a backlog to kill in
                workers, rng, kills=KILLS, feed=lambda k: producer.send(slice_of(COMMENTS, k, KILLS + 2)),
                kill=lambda k: kill_mid_batch(client, workers, rng, k, KEYS)):
            kills.append({"worker": name, "pending_at_kill": held})
        wait_all_judged(client, expected=COMMENTS, what="every verdict, nothing pending (progress: verdicts, pending)")
        counts = verdict_counts(client)
        assert wait_until(lambda: all(w.started() for w in workers), timeout=60)
    finally:
        codes = stop_all(workers)
    lost, doubled = tally(counts, COMMENTS)
    mid_batch = sum(1 for k in kills if k["pending_at_kill"] > 0)
    per_partition = Counter(KEYS.partition_of(cid) for cid in counts)
    print("faults:", json.dumps({"test": "cluster_worker_kills", "comments": COMMENTS, "partitions": PARTITIONS,
                                 "kills": len(kills), "kills_mid_batch": mid_batch, "lost": lost,
                                 "duplicates": doubled, "per_partition": sorted(per_partition.values())}))
    assert set(counts) == {f"c{i}" for i in range(COMMENTS)}
    assert lost == 0 and doubled == 0
    assert verdict_total(client) == COMMENTS
    assert len(per_partition) == PARTITIONS  # every partition took part
    assert pending_total(client) == 0 and deadletter_count(client) == 0
    assert mid_batch >= KILLS // 2, kills
    assert codes == [0, 0]
    # The batch policies (campaign detection is on by default) ran on the cluster too: a policy that fails is
    # only logged (routing's decisions stand), so its errors are looked for in the workers' logs.
    logs = "".join(path.read_text(errors="replace") for path in sorted(tmp_path.glob("*.log")))
    assert "batch policy" not in logs and "CROSSSLOT" not in logs and "same key slot" not in logs
    client.close()


def test_a_primary_killed_mid_stream_fails_over_and_the_loss_is_counted(redis_cluster, tmp_path):
    n = 6_000
    client = redis_cluster.client(socket_timeout=2, socket_connect_timeout=1)
    workers = start_workers(redis_cluster.url, tmp_path, env=CLUSTER_ENV)
    producer = ClusterProducer(client, n=n, rate=1500, chunk=20)
    reader = VerdictReader(redis_cluster.client(socket_timeout=2, socket_connect_timeout=1))
    victim = redis_cluster.primary_of(key_slot(KEYS.part(0).comments))
    try:
        producer.start()
        reader.start()
        wait_for_progress(lambda: verdict_total(client) >= n // 3, lambda: verdict_total(client), stall_s=STALL_S,
                          what="a third of the verdicts before the primary is killed")
        lag_at_kill = replication_lag_bytes(victim, redis_cluster.replica_of(victim))
        killed_at = time.monotonic()
        promoted = redis_cluster.kill_primary(victim)
        failover_s = time.monotonic() - killed_at
        producer.join(timeout=600)
        assert not producer.is_alive()
        final, counts = judged_after_failover(client, reader)
    finally:
        producer.abort.set()
        reader.stop.set()
        codes = stop_all(workers)
    accepted, lost_ids, doubled, vanished = failover_outcome(producer, reader, final, counts)
    print("faults:", json.dumps({"test": "cluster_primary_kill", "comments": n, "accepted": len(accepted),
                                 "producer_retries": producer.errors, "failover_s": round(failover_s, 2),
                                 "lost_acknowledged_comments": len(lost_ids), "duplicates": doubled,
                                 "verdicts_seen_then_rolled_back": len(vanished),
                                 "lost_accepted_s_before_kill": [round(killed_at - accepted[c], 3) for c in
                                                                 (lost_ids[:1] + lost_ids[-1:])],
                                 "replica_lag_bytes_at_kill": lag_at_kill}))
    assert promoted is not victim and redis_cluster.primary_of(key_slot(KEYS.part(0).comments)) is promoted
    assert doubled == 0
    # What asynchronous replication may lose is what the primary acknowledged just before it died: only ids
    # of its partitions, accepted in the moment before the kill.
    victims = {p.index for p in KEYS.parts if redis_cluster.primary_of(key_slot(p.comments)) is promoted}
    for cid in lost_ids:
        assert KEYS.partition_of(cid) in victims, cid
        assert killed_at - 5.0 <= accepted[cid] <= killed_at + failover_s, cid  # a loaded replica may lag seconds
    # a verdict rolled back with the dead primary is written again: its comment still has exactly one verdict
    for _p, _sid, cid in vanished:
        assert counts[cid] == 1 or cid in lost_ids
    assert deadletter_count(client) == 0
    assert codes == [0, 0]
    client.close()


def test_moving_a_partitions_slot_while_serving_loses_and_doubles_nothing(redis_cluster, tmp_path):
    n = 4_000
    client = redis_cluster.client(socket_timeout=5)
    workers = start_workers(redis_cluster.url, tmp_path, env=CLUSTER_ENV)
    producer = ClusterProducer(client, n=n, rate=800, chunk=20)
    slot = key_slot(KEYS.part(0).comments)
    source = redis_cluster.primary_of(slot)
    target = next(p for p in redis_cluster.primaries() if p is not source)
    try:
        producer.start()
        wait_for_progress(lambda: verdict_total(client) >= n // 4, lambda: verdict_total(client), stall_s=STALL_S,
                          what="a quarter of the verdicts before the slot moves")
        before = verdict_total(client)
        # small steps with pauses keep the slot half-moved for a while: the workers meet ASK and TRYAGAIN
        moved = redis_cluster.move_slot(slot, target, keys_per_step=20, pause_s=0.05)
        during = verdict_total(client) - before
        producer.join(timeout=600)
        assert not producer.is_alive()
        wait_all_judged(client, expected=n, what="every verdict after the move (progress: verdicts, pending)")
        counts = verdict_counts(client)
    finally:
        producer.abort.set()
        codes = stop_all(workers)
    lost, doubled = tally(counts, n)
    print("faults:", json.dumps({"test": "cluster_slot_move", "comments": n, "keys_moved": moved,
                                 "verdicts_during_move": during, "producer_retries": producer.errors,
                                 "lost": lost, "duplicates": doubled}))
    assert redis_cluster.primary_of(slot) is target
    assert moved > 0 and during > 0
    # a commit met the half-moved slot (TRYAGAIN, redis-py's retries ran out): it stayed pending and was retried
    assert any("moving slots" in w.output() for w in workers)
    assert set(counts) == {f"c{i}" for i in range(n)}
    assert lost == 0 and doubled == 0
    with target.client() as direct:
        assert direct.execute_command("CLUSTER", "COUNTKEYSINSLOT", slot) > 0
    assert pending_total(client) == 0 and deadletter_count(client) == 0
    assert codes == [0, 0]
    client.close()


@pytest.mark.parametrize("wait_ms", [0, 200], ids=["async", "producer-waits"])
def test_a_primary_dying_after_its_replica_fell_behind_loses_comments_unless_the_producer_waits(
        redis_cluster, tmp_path, wait_ms):
    """A replica stalls (SIGSTOP); its primary keeps acknowledging writes, which pile up in its output
    buffer for the replica, then dies (SIGKILL): the replica takes over without them.  A producer that waits
    for a replica (``WAIT 1 <ms>`` after its XADDs, on the same connection) sends those comments again."""
    n = 1_000  # verdicts before the replica stalls; the producer runs until the failover is over
    client = redis_cluster.client(socket_timeout=2, socket_connect_timeout=1)
    workers = start_workers(redis_cluster.url, tmp_path, env=CLUSTER_ENV)
    producer = ClusterProducer(client, n=10**9, rate=600, chunk=12, wait_ms=wait_ms, pad=4000)
    reader = VerdictReader(redis_cluster.client(socket_timeout=2, socket_connect_timeout=1))
    victim = redis_cluster.primary_of(key_slot(KEYS.part(0).comments))
    replica = redis_cluster.replica_of(victim)
    ours = {p.index for p in KEYS.parts if redis_cluster.primary_of(key_slot(p.comments)) is victim}
    try:
        producer.start()
        reader.start()
        wait_for_progress(lambda: verdict_total(client) >= n, lambda: verdict_total(client), stall_s=STALL_S,
                          what=f"{n} verdicts before the replica stalls")
        with victim.client() as direct:
            replica.pause()
            # Once the replica stops reading, the kernel's socket buffers fill, and what the primary sends next
            # piles up in its own output buffer for the replica: a SIGKILL loses all of that.
            if wait_ms:
                wait_until(lambda: False, timeout=2.0)  # the producer's WAITs time out meanwhile
            else:
                # (a few bytes there are normal between two turns of its event loop; half a megabyte is not)
                wait_until(lambda: replica_output_bytes(direct) > 512 * 1024, timeout=120, interval=0.01,
                           what="the primary's output buffer for its stalled replica filling")
        piled_at = time.monotonic()
        wait_until(lambda: False, timeout=1.0)  # the primary goes on alone for a second
        killed_at = time.monotonic()
        promoted = redis_cluster.kill_primary(victim, stalled_replica=replica)
        redis_cluster.restart(victim)  # back as the promoted replica's replica: WAIT has a replica again
        after = len(producer.accepted_at)
        wait_until(lambda: len(producer.accepted_at) >= after + 600, timeout=120,
                   what="the producer going on after the failover")
        producer.abort.set()
        producer.join(timeout=60)
        assert not producer.is_alive()
        final, counts = judged_after_failover(client, reader)
    finally:
        producer.abort.set()
        reader.stop.set()
        codes = stop_all(workers)
    accepted, lost_ids, doubled, vanished = failover_outcome(producer, reader, final, counts)
    alone = [c for c, t in accepted.items() if piled_at <= t <= killed_at and KEYS.partition_of(c) in ours]
    again = [cid for _p, _sid, cid in vanished if counts[cid] == 1]
    print("faults:", json.dumps({"test": "cluster_replica_behind", "wait_ms": wait_ms, "accepted": len(accepted), "accepted_while_primary_alone": len(alone),
                                 "producer_retries": producer.errors, "lost_acknowledged_comments": len(lost_ids),
                                 "duplicates": doubled, "verdicts_seen_then_rolled_back": len(vanished),
                                 "rolled_back_then_judged_again": len(again)}))
    assert promoted is replica and doubled == 0
    assert all(KEYS.partition_of(c) in ours for c in lost_ids)  # only the dead primary's partitions lose
    assert all(counts[cid] == 1 or cid in lost_ids for _p, _sid, cid in vanished)
    assert all(p in ours for p, _sid, _cid in vanished)
    if wait_ms:
        assert lost_ids == [] and alone == []  # nothing counted as accepted while no replica had it
        assert set(accepted) <= set(counts)
    else:
        assert alone and set(alone) <= set(lost_ids)  # acknowledged by the primary alone, then gone with it
        assert vanished  # and a verdict reader saw verdicts that vanished with it
    assert deadletter_count(client) == 0
    assert codes == [0, 0]
    client.close()


def test_a_cluster_with_a_password_serves_a_worker_with_the_password_in_its_url(tmp_path):
    require(shutil.which("redis-server") is not None, "redis-server binary not on PATH")
    require(shutil.which("redis-cli") is not None, "redis-cli binary not on PATH (redis-tools)")
    cluster = RedisCluster(tmp_path / "cluster", password="cluster-pw-7f3a").start()
    workers = []
    try:
        anonymous = redis.Redis(host="127.0.0.1", port=cluster.nodes[0].port)
        with pytest.raises(redis.AuthenticationError):
            anonymous.ping()
        anonymous.close()
        assert cluster.url.startswith("redis://:cluster-pw-7f3a@")
        client = cluster.client()
        workers = start_workers(cluster.url, tmp_path, env=CLUSTER_ENV, n=1)
        ClusterProducer(client, n=600, rate=1e9, chunk=100).run()
        wait_for_progress(lambda: verdict_total(client) >= 300, lambda: verdict_total(client), stall_s=STALL_S,
                          what="half the verdicts before the slot moves")
        # MIGRATE between the nodes authenticates too (AUTH in the harness's MIGRATE)
        slot = key_slot(KEYS.part(1).comments)
        source = cluster.primary_of(slot)
        assert cluster.move_slot(slot, next(p for p in cluster.primaries() if p is not source)) > 0
        wait_all_judged(client, expected=600, what="every verdict (progress: verdicts, pending)")
        counts = verdict_counts(client)
        assert tally(counts, 600) == (0, 0)
        assert set(counts) == {f"c{i}" for i in range(600)}
        client.close()
    finally:
        codes = stop_all(workers)
        cluster.stop()
    assert codes == [0]


def test_a_cluster_over_tls_serves_a_worker_that_verifies_the_nodes(tmp_path):
    require(shutil.which("redis-server") is not None, "redis-server binary not on PATH")
    require(shutil.which("redis-cli") is not None, "redis-cli binary not on PATH (redis-tools)")
    require(shutil.which("openssl") is not None, "openssl not on PATH")
    certs = make_ca(tmp_path / "pki")
    cluster = RedisCluster(tmp_path / "cluster", tls={"ca": certs["ca"], "cert": certs["cert"],
                                                      "key": certs["key"]}).start()
    workers = []
    try:
        assert cluster.url.startswith("rediss://")
        client = cluster.client()
        env = {**CLUSTER_ENV, "SEAWALL_REDIS_TLS_CA": certs["ca"]}
        workers = start_workers(cluster.url, tmp_path, env=env, n=1)
        ClusterProducer(client, n=300, rate=1e9, chunk=100).run()
        wait_all_judged(client, expected=300, what="every verdict over TLS (progress: verdicts, pending)")
        counts = verdict_counts(client)
        assert tally(counts, 300) == (0, 0) and set(counts) == {f"c{i}" for i in range(300)}
        assert len({KEYS.partition_of(c) for c in counts}) == PARTITIONS
        client.close()
    finally:
        codes = stop_all(workers)
        cluster.stop()
    assert codes == [0]
