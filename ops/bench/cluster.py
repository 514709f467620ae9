"""``seawall bench cluster``: the same workers against a Redis Cluster of 1 shard and of 3 shards.

Two local clusters are started on free loopback ports (nothing on disk; with
``--replicas 1`` one replica per primary, whose CPU is reported apart): one primary serving all 16384 slots, and three primaries each
serving a third (slots ``[s * 16384 // 3, (s + 1) * 16384 // 3)``, the runs
the partition tags are chosen for, so K = 3 or 6 partitions spread evenly).
Each run queues ``--comments`` invented comments over ``--partitions``
partitions, starts ``--workers`` worker processes in cluster mode (built by
:func:`ops.serving.build_consumer`, as ``seawall serve`` does) and waits for
every verdict.  The layouts take turns in every repeat, so a slow spell of a
shared machine hits both; the report gives medians of ``--repeats`` runs:

* **comments/s**: verdicts over the span between the first and the last
  verdict entry id of all partitions (the servers' clocks, one machine);
* **Redis CPU per comment** of each primary (``INFO cpu`` user + system
  before and after the run, divided by all comments) and their sum: what a
  comment costs the cluster, and how evenly the shards share it;
* **worker CPU per comment** (``time.process_time`` of the worker processes);
* **Redis memory per comment**: ``used_memory`` after the run minus before,
  over the comments (stream entries, verdicts, text cache and done markers
  still within their TTL), and its parts by ``MEMORY USAGE`` (the text cache
  and done marker of sampled comments, the partitions' streams);
* the ratios 3 shards / 1 shard, and a **capacity plan** from the CPU and
  memory per comment (see ``--headroom``).

On a machine with few cores the workers, not Redis, bound the 3-shard rate:
more shards cannot raise it there, and the capacity plan comes from CPU per
comment, which does not depend on how busy the machine is.
"""
from __future__ import annotations

import math
import os
import shutil
import socket
import statistics
import subprocess
import tempfile
import time

from model.errors import SeawallError
from ops.bench import report
from ops.bench.servers import free_port

SLOTS = 16_384
PLAN_RATES = (10_000, 100_000, 1_000_000)


class LocalCluster:
    """``with LocalCluster(shards) as cluster:`` a Redis Cluster of ``shards`` primaries on loopback.

    Built without ``redis-cli``: every node gets its share of slots with
    ``CLUSTER ADDSLOTSRANGE`` and meets the first with ``CLUSTER MEET``
    (Redis 7.0+); then the wait, bounded, until each node says
    ``cluster_state:ok``.
    """

    def __init__(self, shards: int, *, replicas: int = 0, start_timeout_s: float = 30.0):
        self.shards = shards
        self.replicas = replicas
        self.start_timeout_s = start_timeout_s
        self.ports: list[tuple[int, int]] = []
        self.procs: list[subprocess.Popen] = []
        self._dir = None

    @property
    def urls(self) -> list[str]:
        """The primaries' URLs (the first ``shards`` nodes)."""
        return [f"redis://127.0.0.1:{port}/0" for port, _bus in self.ports[:self.shards]]

    @property
    def replica_urls(self) -> list[str]:
        return [f"redis://127.0.0.1:{port}/0" for port, _bus in self.ports[self.shards:]]

    def __enter__(self) -> "LocalCluster":
        binary = shutil.which("redis-server")
        if binary is None:
            raise SeawallError("bench cluster: redis-server is not on PATH")
        self._dir = tempfile.TemporaryDirectory(prefix="seawall-bench-cluster-")
        try:
            for s in range(self.shards * (1 + self.replicas)):
                port, bus = free_port(), free_port()
                workdir = os.path.join(self._dir.name, f"node{s}")
                os.mkdir(workdir)
                self.procs.append(subprocess.Popen(
                    [binary, "--bind", "127.0.0.1", "--port", str(port), "--save", "", "--appendonly", "no",
                     "--dir", workdir, "--protected-mode", "no", "--daemonize", "no", "--cluster-enabled", "yes",
                     "--cluster-config-file", "nodes.conf", "--cluster-port", str(bus),
                     "--repl-diskless-sync-delay", "0"],
                    stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL))
                self.ports.append((port, bus))
            self._join()
        except BaseException:
            self.__exit__(None, None, None)
            raise
        return self

    def _join(self) -> None:
        deadline = time.monotonic() + self.start_timeout_s
        for port, _bus in self.ports:
            while True:
                try:
                    with socket.create_connection(("127.0.0.1", port), timeout=0.2):
                        break
                except OSError:
                    if time.monotonic() > deadline:
                        raise SeawallError(f"bench cluster: redis-server did not start on port {port}") from None
                    time.sleep(0.02)
        import redis

        first_port, first_bus = self.ports[0]
        primary_ids = []
        for s, client in enumerate(self.direct_clients()):
            with client:
                low, high = s * SLOTS // self.shards, (s + 1) * SLOTS // self.shards - 1
                client.execute_command("CLUSTER", "ADDSLOTSRANGE", low, high)
                primary_ids.append(client.execute_command("CLUSTER", "MYID").decode())
                if s:
                    client.execute_command("CLUSTER", "MEET", "127.0.0.1", first_port, first_bus)
        for client in self.replica_clients():
            with client:
                client.execute_command("CLUSTER", "MEET", "127.0.0.1", first_port, first_bus)
        nodes = self.shards * (1 + self.replicas)
        pending = list(enumerate(self.replica_clients()))  # replica r follows primary r % shards
        while time.monotonic() < deadline:
            for r, client in list(pending):
                with client:
                    try:  # it must know its primary first (the MEET spreads by gossip)
                        client.execute_command("CLUSTER", "REPLICATE", primary_ids[r % self.shards])
                        pending.remove((r, client))
                    except redis.ResponseError:
                        pass
            states = []
            for client in self.direct_clients() + self.replica_clients():
                with client:
                    info = client.execute_command("CLUSTER", "INFO").decode()
                    replication = client.info("replication")
                    states.append("cluster_state:ok" in info and f"cluster_known_nodes:{nodes}" in info
                                  and replication.get("master_link_status", "up") == "up")
            if not pending and all(states):
                return
            time.sleep(0.1)
        raise SeawallError(f"bench cluster: {self.shards}-shard cluster not ok after {self.start_timeout_s}s")

    def direct_clients(self):
        """One plain client per primary (for INFO and FLUSHALL, which concern one node)."""
        import redis

        return [redis.Redis.from_url(url) for url in self.urls]

    def replica_clients(self):
        import redis

        return [redis.Redis.from_url(url) for url in self.replica_urls]

    def client(self):
        from redis.cluster import RedisCluster

        return RedisCluster.from_url(self.urls[0])

    def __exit__(self, *exc) -> None:
        for proc in self.procs:
            if proc.poll() is None:
                proc.terminate()
        for proc in self.procs:
            try:
                proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()
        self.procs = []
        if self._dir is not None:
            self._dir.cleanup()
            self._dir = None


def _node_cpu_and_memory(cluster: LocalCluster) -> list[tuple[float, int]]:
    """(CPU seconds so far, used_memory bytes) of each primary, from INFO."""
    out = []
    for client in cluster.direct_clients():
        with client:
            cpu, memory = client.info("cpu"), client.info("memory")
        out.append((float(cpu["used_cpu_user"]) + float(cpu["used_cpu_sys"]), int(memory["used_memory"])))
    return out


def _replica_cpu(cluster: LocalCluster) -> float:
    """CPU seconds so far of all the replicas together."""
    total = 0.0
    for client in cluster.replica_clients():
        with client:
            cpu = client.info("cpu")
        total += float(cpu["used_cpu_user"]) + float(cpu["used_cpu_sys"])
    return total


def _one_run(cluster: LocalCluster, comments, *, run: str, model_path: str, args) -> dict:
    """Queue the comments, let the workers drain them, and measure; the cluster is emptied afterwards."""
    import multiprocessing

    from ops.bench.stream import run_worker
    from worker.partitions import send_comment
    from worker.settings import Keys

    prefix = f"seawall-bench-{run}:"
    keys = Keys(prefix=prefix, partitions=args.partitions)
    overrides = {"redis_url": cluster.urls[0], "redis.cluster": True, "keys.prefix": prefix,
                 "keys.partitions": args.partitions, "worker.batch": args.batch, "worker.block_ms": args.block_ms,
                 "worker.claim_every_s": 3600.0}
    client = cluster.client()
    ctx = multiprocessing.get_context("spawn")
    results = ctx.Queue()
    procs = []
    try:
        pipe = client.pipeline(transaction=False)
        for i, (text, _label) in enumerate(comments):
            send_comment(client, keys, {"id": f"b{i}", "text": text, "site": f"site{i % 4}.example"}, pipeline=pipe)
            if len(pipe) >= 1000:
                pipe.execute()
        pipe.execute()
        before, replicas_before = _node_cpu_and_memory(cluster), _replica_cpu(cluster)
        events = []
        for w in range(args.workers):
            ready = ctx.Event()
            proc = ctx.Process(target=run_worker, daemon=True,
                               args=(overrides, model_path, False, False, f"bench-{w}", ready, results))
            proc.start()
            procs.append(proc)
            events.append(ready)
        for ready, proc in zip(events, procs):
            while not ready.wait(0.1):
                if not proc.is_alive():
                    raise SeawallError(f"bench cluster: worker exited with {proc.exitcode} before it was ready")
        deadline = time.monotonic() + args.timeout_s
        while sum(client.xlen(part.verdicts) for part in keys.parts) < len(comments):
            if time.monotonic() > deadline:
                raise SeawallError(f"bench cluster: not every verdict after {args.timeout_s:.0f}s")
            time.sleep(0.02)
        after, replicas_after = _node_cpu_and_memory(cluster), _replica_cpu(cluster)
        for proc in procs:
            proc.terminate()
        stats = [results.get(timeout=60) for _ in procs]
        for proc in procs:
            proc.join(timeout=30)
        procs = []
        stamps = []
        for part in keys.parts:
            last = "-"
            while True:
                page = client.xrange(part.verdicts, min=last, count=5000)
                page = page[1:] if last != "-" else page
                if not page:
                    break
                stamps.extend(int(sid.split(b"-")[0]) for sid, _ in page)
                last = page[-1][0].decode()
        n = len(comments)
        sample = [f"b{i}" for i in range(0, n, max(1, n // 200))]
        text_bytes = statistics.mean(client.memory_usage(keys.text(cid)) or 0 for cid in sample)
        done_bytes = statistics.mean(client.memory_usage(keys.done(cid)) or 0 for cid in sample)
        stream_bytes = sum((client.memory_usage(part.comments, samples=0) or 0)
                           + (client.memory_usage(part.verdicts, samples=0) or 0) for part in keys.parts) / n
        span_s = max(max(stamps) - min(stamps), 1) / 1000.0
        by_shard = [(a[0] - b[0]) * 1e6 / n for a, b in zip(after, before)]
        return {"per_s": (len(stamps) - 1) / span_s, "verdicts": len(stamps),
                "redis_cpu_us_by_shard": by_shard, "redis_cpu_us": sum(by_shard),
                "replica_cpu_us": (replicas_after - replicas_before) * 1e6 / n,
                "worker_cpu_us": sum(s["cpu_s"] for s in stats) / n * 1e6,
                "redis_bytes": sum(a[1] - b[1] for a, b in zip(after, before)) / n,
                "text_bytes": text_bytes, "done_bytes": done_bytes, "stream_bytes": stream_bytes}
    finally:
        for proc in procs:
            if proc.is_alive():
                proc.kill()
        client.close()
        for direct in cluster.direct_clients():
            with direct:
                direct.flushall()


def capacity_plan(*, redis_cpu_us: float, worker_cpu_us: float, redis_bytes: float, headroom: float,
                  retention_s: float) -> dict:
    """Shards, worker cores and Redis memory for each of :data:`PLAN_RATES`, on paper.

    A shard (one primary core) is planned at ``headroom`` of its CPU, a worker
    core likewise; memory is the bytes per comment times the comments of
    ``retention_s`` seconds (what the streams and caches hold at steady state,
    assumed to be trimmed to that window), with a replica doubling it.

    >>> plan = capacity_plan(redis_cpu_us=50, worker_cpu_us=300, redis_bytes=1000, headroom=0.5, retention_s=3600)
    >>> plan["plan_10000_per_s"]
    '1 shards, 6 worker cores, 36.0 GB per copy'
    """
    out = {}
    for rate in PLAN_RATES:
        shards = max(1, math.ceil(rate * redis_cpu_us / 1e6 / headroom))
        cores = max(1, math.ceil(rate * worker_cpu_us / 1e6 / headroom))
        memory_gb = rate * retention_s * redis_bytes / 1e9
        out[f"plan_{rate}_per_s"] = f"{shards} shards, {cores} worker cores, {memory_gb:,.1f} GB per copy"
    return out


def run(args) -> int:
    from ops.bench.stream import invented_comments, train_model

    if args.partitions < 3:
        raise SeawallError("bench cluster: --partitions must be at least 3, so that 3 shards each get a partition")
    comments = invented_comments(args.comments, seed=5)
    runs: dict[int, list[dict]] = {1: [], 3: []}
    with tempfile.TemporaryDirectory(prefix="seawall-bench-") as tmp:
        model_path = os.path.join(tmp, "model.bin")
        train_model(model_path)
        with LocalCluster(1, replicas=args.replicas) as one, LocalCluster(3, replicas=args.replicas) as three:
            for r in range(args.repeats):
                for shards, cluster in ((1, one), (3, three)):
                    runs[shards].append(_one_run(cluster, comments, run=f"{os.getpid()}-{shards}-{r}",
                                                 model_path=model_path, args=args))

    def med(shards, name):
        return statistics.median(run_[name] for run_ in runs[shards])

    by_shard = [statistics.median(r["redis_cpu_us_by_shard"][s] for r in runs[3]) for s in range(3)]
    redis_cpu = med(3, "redis_cpu_us")
    worker_cpu = med(3, "worker_cpu_us")
    redis_bytes = med(3, "redis_bytes")
    rows = {
        "comments": len(comments),
        "partitions": args.partitions,
        "workers": args.workers,
        "cores_on_this_machine": os.cpu_count(),
        "repeats": args.repeats,
        "replicas_per_primary": args.replicas,
        "one_shard_per_s": med(1, "per_s"),
        "three_shards_per_s": med(3, "per_s"),
        "ratio_per_s_3_to_1": med(3, "per_s") / med(1, "per_s"),
        "one_shard_redis_cpu_us_per_comment": med(1, "redis_cpu_us"),
        "three_shards_redis_cpu_us_per_comment": redis_cpu,
        "ratio_redis_cpu_3_to_1": redis_cpu / med(1, "redis_cpu_us"),
        "one_shard_replica_cpu_us_per_comment": med(1, "replica_cpu_us"),
        "three_shards_replica_cpu_us_per_comment": med(3, "replica_cpu_us"),
        "three_shards_redis_cpu_us_per_comment_by_shard": " / ".join(f"{v:.1f}" for v in by_shard),
        "busiest_shard_share": max(by_shard) / max(sum(by_shard), 1e-9),
        "one_shard_worker_cpu_us_per_comment": med(1, "worker_cpu_us"),
        "three_shards_worker_cpu_us_per_comment": worker_cpu,
        "redis_bytes_per_comment": redis_bytes,
        "text_cache_bytes_per_comment": med(3, "text_bytes"),
        "done_marker_bytes_per_comment": med(3, "done_bytes"),
        "streams_bytes_per_comment": med(3, "stream_bytes"),
        # what one uncontended core per shard, and enough worker cores, would carry
        "one_core_per_shard_per_s": 1e6 / max(by_shard) if max(by_shard) > 0 else float("inf"),
        "one_worker_core_per_s": 1e6 / worker_cpu,
        "bound_here": ("workers (CPU): with this machine's cores, more shards cannot raise the rate; "
                       "plan from CPU per comment") if worker_cpu > redis_cpu else "Redis (CPU)",
        "headroom": args.headroom,
        "retention_s": args.retention_s,
        **capacity_plan(redis_cpu_us=redis_cpu, worker_cpu_us=worker_cpu, redis_bytes=redis_bytes,
                        headroom=args.headroom, retention_s=args.retention_s),
    }
    report("seawall bench cluster (medians; 1 shard and 3 shards in turns, same workers)", rows, as_json=args.json)
    return 0


def register(sub) -> None:
    parser = sub.add_parser("cluster", help="1 shard vs 3 shards of a local Redis Cluster: comments/s, Redis CPU "
                                            "per comment per shard, capacity plan")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.add_argument("--comments", type=int, default=20_000, help="comments per run")
    parser.add_argument("--partitions", type=int, default=6, help="K partitions of the comment stream (>= 3)")
    parser.add_argument("--workers", type=int, default=2, help="worker processes, the same for both layouts")
    parser.add_argument("--repeats", type=int, default=3, help="runs of each layout, taken in turns")
    parser.add_argument("--replicas", type=int, choices=(0, 1), default=0,
                        help="replicas per primary (their CPU is reported apart; the primaries' includes feeding them)")
    parser.add_argument("--batch", type=int, default=256, help="worker batch size")
    parser.add_argument("--block-ms", type=int, default=100, help="worker XREADGROUP block time")
    parser.add_argument("--timeout-s", type=float, default=600.0, help="longest wait for one run's verdicts")
    parser.add_argument("--headroom", type=float, default=0.5,
                        help="planned share of each Redis and worker core in the capacity plan")
    parser.add_argument("--retention-s", type=float, default=3600.0,
                        help="seconds of comments Redis holds at steady state, for the memory plan")
    parser.set_defaults(func=run)
