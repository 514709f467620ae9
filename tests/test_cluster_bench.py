"""`seawall bench cluster` end to end, small and once: the harness and its report, not the speed."""
from __future__ import annotations

import json
import shutil

import pytest

from ops.bench.cluster import LocalCluster, capacity_plan
from ops.cli import main
from servers import require
from worker.partitions import SLOTS

pytestmark = [pytest.mark.redis_server]


def test_local_cluster_splits_the_slots_evenly_between_its_primaries():
    require(shutil.which("redis-server") is not None, "redis-server binary not on PATH")
    with LocalCluster(3) as cluster:
        served = []
        for client in cluster.direct_clients():
            with client:
                mine = client.execute_command("CLUSTER", "MYID").decode()
                nodes = client.execute_command("CLUSTER", "NODES").decode()
            row = next(line.split() for line in nodes.splitlines() if line.startswith(mine))
            served.append(row[8])
        # the runs the partition tags are chosen in: [s * 16384 // 3, (s + 1) * 16384 // 3)
        assert served == [f"{s * SLOTS // 3}-{(s + 1) * SLOTS // 3 - 1}" for s in range(3)] == ["0-5460", "5461-10921", "10922-16383"]
        with cluster.client() as client:
            for i in range(30):
                client.set(f"k{i}", i)
            assert sum(int(client.get(f"k{i}")) for i in range(30)) == sum(range(30))


def test_local_cluster_with_replicas_has_each_primary_followed():
    require(shutil.which("redis-server") is not None, "redis-server binary not on PATH")
    with LocalCluster(3, replicas=1) as cluster:
        assert len(cluster.replica_urls) == 3
        for primary in cluster.direct_clients():
            with primary:
                replication = primary.info("replication")
                assert replication["role"] == "master" and replication["connected_slaves"] == 1
        with cluster.client() as client:
            client.set("{p0}:x", "1")
            assert client.get("{p0}:x") == b"1"


def test_capacity_plan_rounds_up_and_scales_with_the_rate():
    plan = capacity_plan(redis_cpu_us=30.0, worker_cpu_us=250.0, redis_bytes=800.0, headroom=0.5, retention_s=60)
    assert plan["plan_10000_per_s"] == "1 shards, 5 worker cores, 0.5 GB per copy"
    assert plan["plan_100000_per_s"] == "6 shards, 50 worker cores, 4.8 GB per copy"
    assert plan["plan_1000000_per_s"] == "60 shards, 500 worker cores, 48.0 GB per copy"


@pytest.mark.slow
def test_bench_cluster_runs_both_layouts_and_reports_per_shard_cpu(capsys):
    require(shutil.which("redis-server") is not None, "redis-server binary not on PATH")
    assert main(["bench", "cluster", "--comments", "600", "--repeats", "1", "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert rows["comments"] == 600 and rows["partitions"] == 6 and rows["workers"] == 2
    assert rows["replicas_per_primary"] == 0 and rows["three_shards_replica_cpu_us_per_comment"] == 0
    assert rows["one_shard_per_s"] > 0 and rows["three_shards_per_s"] > 0
    assert rows["ratio_per_s_3_to_1"] == pytest.approx(rows["three_shards_per_s"] / rows["one_shard_per_s"], rel=1e-6)
    shards = [float(v) for v in rows["three_shards_redis_cpu_us_per_comment_by_shard"].split(" / ")]
    assert len(shards) == 3 and all(v > 0 for v in shards)  # 6 partitions: every shard did work
    assert sum(shards) == pytest.approx(rows["three_shards_redis_cpu_us_per_comment"], rel=0.01)
    assert rows["one_shard_redis_cpu_us_per_comment"] > 0 and rows["three_shards_worker_cpu_us_per_comment"] > 0
    assert rows["redis_bytes_per_comment"] > 0 and rows["text_cache_bytes_per_comment"] > 0
    assert set(rows) >= {"plan_10000_per_s", "plan_100000_per_s", "plan_1000000_per_s", "bound_here"}
