"""Redis Streams behind the transport seam: a consumer group in, the one Lua commit out.

:class:`RedisStreamSource` reads the ``comments`` stream as one consumer of
the ``workers`` group through a :class:`worker.groupreader.GroupReader`: its
own pending entries first (left by a crash or a lost connection), then new
ones; when the worker asks, it takes over entries idle longer than
``claim_idle_ms`` on other consumers (XAUTOCLAIM, with a round cap).
:class:`RedisStreamSink` commits a batch with :class:`worker.commit.BatchCommitter`,
whose script also acknowledges (XACK) what it wrote, atomically; so
:meth:`RedisStreamSource.acknowledge` has nothing left to do.

Every ``redis`` exception these raise becomes a :class:`worker.transport.TransientError`
here, so the worker loop never sees a ``redis.*`` type.
"""
from __future__ import annotations

import contextlib
import logging
import time
from collections.abc import Sequence

import redis

from worker.campaignstore import RedisCampaignStore
from worker.commit import BatchCommitter, Limits as CommitLimits
from worker.groupreader import GroupReader, group_lag
from worker.settings import Keys, WorkerSettings
from worker.transport import Batch, Lag, TransientError

log = logging.getLogger("seawall.worker")

TRIMMED_DETAIL = "the entry was deleted from the stream before it was scored"

# With several partitions, a worker blocks this long (ms, at most block_ms) on one of them when all were empty:
# a comment arriving on another partition waits at most this long.
SHARED_BLOCK_MS = 50


@contextlib.contextmanager
def redis_errors():
    """Turn what Redis may raise mid-stream into :class:`TransientError` (the batch stays pending)."""
    try:
        yield
    except redis.AuthenticationError as exc:
        raise TransientError("Redis refused the credentials; check the user and password in the URL") from exc
    except (redis.ConnectionError, redis.TimeoutError) as exc:
        raise TransientError("lost connection to Redis") from exc
    except (redis.exceptions.ClusterError, redis.exceptions.TryAgainError, redis.exceptions.AskError,
            redis.exceptions.SlotNotCoveredError, redis.exceptions.RedisClusterUnreachableError) as exc:
        # A failover or a slot migration in progress: redis-py's cluster client follows MOVED/ASK and retries
        # TRYAGAIN/CLUSTERDOWN itself a few times; what is still left once it gives up passes with time.
        raise TransientError("the Redis Cluster is failing over or moving slots; the batch stays pending") from exc
    except redis.ResponseError as exc:
        if "NOGROUP" in str(exc):
            # The server came back without the group (no persistence): make it again.
            raise TransientError("the consumer group is gone; creating it again", regroup=True) from exc
        # OOM, BUSY, a key of the wrong type...: the batch stays pending; back off and retry.
        raise TransientError("Redis refused a command; the batch stays pending") from exc


class RedisStreamSource:
    """One consumer of the comment stream's partitions in group ``keys.group``.

    Each partition this worker reads has its own
    :class:`worker.groupreader.GroupReader` (one XREADGROUP names one stream:
    several streams in one call would span hash slots on a cluster), and each
    :class:`Batch` comes from one partition and carries it, so the sink commits
    it to that partition.  Without ``leases`` the worker reads every partition
    (K = 1: the one stream, exactly as a single-stream deployment always did);
    with a :class:`worker.leases.Leases` it reads the partitions it holds.

    Reading several partitions: one non-blocking read of each in turn, starting
    after the partition that gave the last batch; only when all were empty does
    it block, on the next one, for at most :data:`SHARED_BLOCK_MS` (one
    partition blocks for ``block_ms``, as a single stream always did).

    Parameters
    ----------
    client : a redis-py client from :func:`worker.connection.connect` (raw stream replies).
    keys, settings : ``Config.keys`` and ``Config.worker``.
    consumer : this consumer's name in the group.
    leases : the partitions this worker holds (``None``: all of them).
    """

    service = "Redis"

    def __init__(self, *, client, keys: Keys, settings: WorkerSettings, consumer: str, leases=None):
        self.client = client
        self.keys = keys
        self.settings = settings
        self.consumer = consumer
        self.leases = leases
        if keys.partitions == 1:
            self.describe = f"{keys.part(0).comments} as group {keys.group}"
        else:
            held = "its leased partitions" if leases is not None else "every partition"
            self.describe = (f"{held} of {keys.partitions} ({keys.part(0).comments} ... "
                             f"{keys.part(keys.partitions - 1).comments}) as group {keys.group}")
        self._readers: dict[int, GroupReader] = {}
        self._ready: set[int] = set()  # partitions whose group exists since the last prepare()
        self._held: tuple[int, ...] = tuple(range(keys.partitions)) if leases is None else ()
        self._turn = 0

    # -- partitions ---------------------------------------------------------------------------

    def reader_of(self, partition: int) -> GroupReader:
        """The group reader of ``partition`` (made on first use)."""
        reader = self._readers.get(partition)
        if reader is None:
            s = self.settings
            reader = GroupReader(client=self.client, stream=self.keys.part(partition).comments, group=self.keys.group,
                                 consumer=self.consumer, batch=s.batch, block_ms=s.block_ms,
                                 claim_idle_ms=s.claim_idle_ms)
            self._readers[partition] = reader
        return reader

    @property
    def reader(self) -> GroupReader:
        """Partition 0's group reader (the one stream of a K = 1 deployment)."""
        return self.reader_of(0)

    @property
    def held(self) -> tuple[int, ...]:
        """The partitions this worker reads now."""
        return self._held

    def _partitions(self, *, force: bool = False) -> tuple[int, ...]:
        # Must run inside redis_errors(): renewing leases talks to Redis.
        if self.leases is not None:
            held = tuple(self.leases.tick(force=force))
            if held != self._held:
                for gone in set(self._held) - set(held):
                    self._ready.discard(gone)
                    self._readers.pop(gone, None)
                self._held = held
        for p in self._held:
            if p not in self._ready:
                self.reader_of(p).ensure_group()  # also goes back to this consumer's own pending entries there
                self._ready.add(p)
        return self._held

    # -- the seam -----------------------------------------------------------------------------

    def prepare(self) -> None:
        """Create the groups if missing, and go back to this consumer's own pending entries."""
        self._ready.clear()
        with redis_errors():
            self._partitions(force=True)

    def read(self, *, block: bool = True) -> Batch:
        """The next batch of one partition: its pending entries first (with delivery counts), then new ones."""
        with redis_errors():
            held = self._partitions()
            if not held:
                if block:  # nothing leased yet: wait as a blocking read would, then ask again
                    time.sleep(min(self.settings.block_ms, SHARED_BLOCK_MS) / 1000.0)
                return Batch([])
            if len(held) == 1:
                entries, deliveries = self.reader_of(held[0]).read(block=block)
                return Batch(entries, deliveries, partition=held[0])
            n = len(held)
            for i in range(n):
                p = held[(self._turn + i) % n]
                entries, deliveries = self.reader_of(p).read(block=False)
                if entries:
                    self._turn = (self._turn + i + 1) % n
                    return Batch(entries, deliveries, partition=p)
            p = held[self._turn % n]
            self._turn = (self._turn + 1) % n
            if not block:
                return Batch([], partition=p)
            entries, deliveries = self.reader_of(p).read(block=True,
                                                         block_ms=min(self.settings.block_ms, SHARED_BLOCK_MS))
            return Batch(entries, deliveries, partition=p)

    def claim(self):
        """Batches taken over from consumers idle longer than ``claim_idle_ms`` (a generator), partition by partition.

        Entries deleted from the stream before they were scored come back in
        ``Batch.gone``; they are already written to the dead-letter stream.
        """
        for p in self._held:
            claims = self.reader_of(p).claim()
            while True:
                with redis_errors():
                    claimed = next(claims, None)
                    if claimed is None:
                        break
                    if claimed.deleted:
                        self._dead_letter_trimmed(p, claimed.deleted)
                    ids = [e.stream_id for e in claimed.entries]
                    deliveries = self.reader_of(p).deliveries(ids) if ids else None
                yield Batch(claimed.entries, deliveries, claimed=True, gone=list(claimed.deleted), partition=p)

    def _dead_letter_trimmed(self, partition: int, stream_ids: Sequence[bytes]) -> None:
        # XAUTOCLAIM already dropped these from the pending list, and only this
        # consumer saw them go, so no XACK guard is needed (or possible).
        part = self.keys.part(partition)
        pipe = self.client.pipeline(transaction=False)
        for sid in stream_ids:
            pipe.xadd(part.deadletter,
                      {"reason": "trimmed", "detail": TRIMMED_DETAIL, "stream_id": sid, "source": part.comments},
                      maxlen=self.settings.deadletter_maxlen, approximate=True)
        pipe.execute()

    def acknowledge(self, batch: Batch) -> None:
        """Nothing to do: the sink's script acknowledged each entry with its verdict."""

    def lag(self) -> Lag:
        """The group's lag and pending count summed over all K partitions, and how many this worker reads.

        Every worker reports the same group-wide figures whatever it holds, as
        with K = 1, so that dashboards and autoscalers take the ``max`` over
        workers for any K.  A partition's lag is read without creating its
        stream or group.
        """
        total_lag: int | None = 0
        pending = 0
        with redis_errors():
            for part in self.keys.parts:
                lag = group_lag(self.client, part.comments, self.keys.group)
                pending += lag.pending
                total_lag = None if total_lag is None or lag.lag is None else total_lag + lag.lag
        return Lag(total_lag, pending, len(self._held))

    def release(self) -> None:
        """Give back this worker's leases so that the others take its partitions now (best effort)."""
        if self.leases is None:
            return
        try:
            self.leases.release_all()
        except (redis.RedisError, redis.exceptions.RedisClusterException) as exc:
            log.warning("could not give back the partition leases (%s); they expire on their own", type(exc).__name__)
        self._held = ()
        self._ready.clear()


class RedisStreamSink:
    """Commits a batch read by a :class:`RedisStreamSource` of the same consumer (one Lua call, to its partition)."""

    def __init__(self, *, client, keys: Keys, settings: WorkerSettings, consumer: str):
        self.client = client
        self.consumer = consumer
        self.committer = BatchCommitter(keys=keys, limits=CommitLimits.from_settings(settings))

    def commit(self, batch: Batch, scored, dead, *, model: str, now: float) -> list[int]:
        with redis_errors():
            return self.committer.commit(self.client, scored, dead, model=model, now=now, consumer=self.consumer,
                                         partition=batch.partition)


class RedisState:
    """The state port of the batch policies, on Redis: ``campaigns`` is a
    :class:`worker.campaignstore.RedisCampaignStore`.

    :meth:`guard` turns a lost connection during a policy into a
    :class:`TransientError`, so that the batch is read again; any other error
    stays a policy bug (logged, decisions kept).
    """

    def __init__(self, client, keys: Keys):
        self.campaigns = RedisCampaignStore(client, keys)

    @contextlib.contextmanager
    def guard(self):
        try:
            yield
        except (redis.ConnectionError, redis.TimeoutError) as exc:
            raise TransientError("lost connection to Redis") from exc


def redis_consumer(*, client, keys: Keys, settings: WorkerSettings, model_source, consumer: str = "",
                   observer=None, policies=(), clock=None, state=None):
    """A :class:`worker.consumer.StreamConsumer` on Redis Streams: source and sink on ``client``.

    ``state`` is the policies' state port (:class:`RedisState` on ``client`` when not given).

    ``consumer`` empty means ``settings.consumer`` or ``<hostname>-<pid>``.  With
    ``keys.partitions > 1`` the worker reads the partitions it holds leases on
    (:class:`worker.leases.Leases`).
    """
    import time

    from worker.consumer import StreamConsumer, default_consumer_name

    name = consumer or settings.consumer or default_consumer_name()
    leases = None
    if keys.partitions > 1:  # every partition has one active reader: workers share them through leases
        from worker.leases import Leases

        leases = Leases(client=client, keys=keys, consumer=name, lease_ms=int(settings.lease_ms))
    return StreamConsumer(
        source=RedisStreamSource(client=client, keys=keys, settings=settings, consumer=name, leases=leases),
        sink=RedisStreamSink(client=client, keys=keys, settings=settings, consumer=name),
        state=state if state is not None else RedisState(client, keys),
        keys=keys, settings=settings, model_source=model_source, observer=observer, policies=policies,
        clock=clock if clock is not None else time.time,
    )
