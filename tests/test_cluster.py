"""The local Redis Cluster the cluster tests run on (tests/servers.py ``RedisCluster``), checked against itself.

Six ``redis-server`` processes, three primaries and three replicas, joined by
``redis-cli --cluster create``.  Checks against the outside world: the slot a
real cluster computes (``CLUSTER KEYSLOT``) for the Redis cluster
specification's example keys and for every partition tag equals
``worker.partitions.key_slot``.
"""
from __future__ import annotations

import pytest

from worker.partitions import SLOTS, key_slot, partition_tag
from worker.settings import Keys

pytestmark = [pytest.mark.redis_server]


def test_cluster_has_three_primaries_each_with_a_replica_and_every_slot_served(shared_cluster):
    rows = shared_cluster.topology()
    primaries = [r for r in rows if "master" in r["flags"]]
    replicas = [r for r in rows if "slave" in r["flags"]]
    assert len(primaries) == 3 and len(replicas) == 3
    assert sorted(s for r in primaries for s in r["slots"]) == list(range(SLOTS))
    assert {r["primary"] for r in replicas} == {r["id"] for r in primaries}
    for node in shared_cluster.nodes:
        assert node.cluster_info()["cluster_state"] == "ok"


# The cluster specification's examples: "123456789" hashes to 0x31C3 (CRC16-XMODEM check value); a key's hash
# tag is the part between the first "{" and the next "}" when that part is not empty, otherwise the whole key.
SPEC_KEYS = ["123456789", "{user1000}.following", "{user1000}.followers", "foo{}{bar}", "foo{{bar}}zap",
             "foo{bar}{zap}", "{}", "}{", "user1000", "", "seawall:comments", "seawall:{p1.4}:comments"]


@pytest.mark.parametrize("key", SPEC_KEYS, ids=lambda k: repr(k))
def test_key_slot_equals_cluster_keyslot_for_the_specification_examples(shared_cluster, key):
    with shared_cluster.client() as client:
        assert client.execute_command("CLUSTER", "KEYSLOT", key) == key_slot(key)


@pytest.mark.parametrize("k", [1, 2, 3, 6, 16, 256])
def test_key_slot_equals_cluster_keyslot_for_every_partition_tag(shared_cluster, k):
    keys = Keys(partitions=k)
    with shared_cluster.client() as client:
        pipe = client.pipeline()  # KEYSLOT takes no key: each goes to some node, all answer the same
        for part in keys.parts:
            pipe.execute_command("CLUSTER", "KEYSLOT", part.comments)
        assert pipe.execute() == [key_slot(part.comments) for part in keys.parts]
    if k > 1:
        assert [key_slot(part.comments) for part in keys.parts] == [key_slot(partition_tag(p, k)) for p in range(k)]


def test_three_partitions_land_on_three_primaries(shared_cluster):
    keys = Keys(partitions=3)
    owners = [shared_cluster.primary_of(key_slot(part.comments)).address for part in keys.parts]
    assert len(set(owners)) == 3, owners


def test_cluster_client_writes_and_reads_every_partition(shared_cluster):
    keys = Keys(partitions=6)
    with shared_cluster.client() as client:
        for part in keys.parts:
            client.xadd(part.comments, {"id": f"c-{part.index}", "text": "the ferry runs late on sundays"})
            client.set(part.done(f"c-{part.index}"), 1)
        # each key really sits on the primary that serves its slot, not only behind the client's redirects
        for part in keys.parts:
            owner = shared_cluster.primary_of(key_slot(part.comments))
            with owner.client() as direct:
                assert direct.xlen(part.comments) == 1
                assert direct.exists(part.done(f"c-{part.index}")) == 1
            assert client.xrange(part.comments)[0][1][b"id"] == f"c-{part.index}".encode()


@pytest.mark.slow
def test_a_killed_primary_is_replaced_by_its_replica_and_rejoins_as_a_replica(redis_cluster):
    slot = key_slot("{p0}")
    primary = redis_cluster.primary_of(slot)
    replica = redis_cluster.replica_of(primary)
    with primary.client() as direct:
        pipe = direct.pipeline(transaction=False)  # WAIT counts the writes of its own connection
        pipe.set("{p0}:kept", "before")
        pipe.execute_command("WAIT", 1, 5000)
        assert pipe.execute() == [True, 1]  # the write is on the replica before the kill
    promoted = redis_cluster.kill_primary(primary)
    assert promoted is replica and redis_cluster.primary_of(slot) is replica
    with redis_cluster.client() as client:
        assert client.get("{p0}:kept") == b"before"
        client.set("{p0}:kept", "after")
    redis_cluster.restart(primary)
    row = next(r for r in redis_cluster.topology() if r["address"] == primary.address)
    assert "slave" in row["flags"] and row["primary"] == replica.node_id()
    with redis_cluster.client() as client:
        assert client.get("{p0}:kept") == b"after"


@pytest.mark.slow
def test_move_slot_moves_its_keys_and_the_client_follows(redis_cluster):
    slot = key_slot("{p1}")
    source = redis_cluster.primary_of(slot)
    target = next(p for p in redis_cluster.primaries() if p is not source)
    with redis_cluster.client() as client:
        for i in range(25):
            client.set(f"{{p1}}:k{i}", i)
        moved = redis_cluster.move_slot(slot, target, keys_per_step=7)
        assert moved == 25 and redis_cluster.primary_of(slot) is target
        assert [int(client.get(f"{{p1}}:k{i}")) for i in range(25)] == list(range(25))
    with target.client() as direct:
        assert direct.execute_command("CLUSTER", "COUNTKEYSINSLOT", slot) == 25
    with source.client() as direct:
        assert direct.execute_command("CLUSTER", "COUNTKEYSINSLOT", slot) == 0
