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
from collections.abc import Sequence

import redis

from worker.campaignstore import RedisCampaignStore
from worker.commit import BatchCommitter, Limits as CommitLimits
from worker.groupreader import GroupReader
from worker.settings import Keys, WorkerSettings
from worker.transport import Batch, Lag, TransientError

log = logging.getLogger("seawall.worker")

TRIMMED_DETAIL = "the entry was deleted from the stream before it was scored"


@contextlib.contextmanager
def redis_errors():
    """Turn what Redis may raise mid-stream into :class:`TransientError` (the batch stays pending)."""
    try:
        yield
    except redis.AuthenticationError as exc:
        raise TransientError("Redis refused the credentials; check the user and password in the URL") from exc
    except (redis.ConnectionError, redis.TimeoutError) as exc:
        raise TransientError("lost connection to Redis") from exc
    except redis.ResponseError as exc:
        if "NOGROUP" in str(exc):
            # The server came back without the group (no persistence): make it again.
            raise TransientError("the consumer group is gone; creating it again", regroup=True) from exc
        # OOM, BUSY, a key of the wrong type...: the batch stays pending; back off and retry.
        raise TransientError("Redis refused a command; the batch stays pending") from exc


class RedisStreamSource:
    """One consumer of ``keys.comments`` in group ``keys.group``, on a :class:`worker.groupreader.GroupReader`.

    Parameters
    ----------
    client : a redis-py client from :func:`worker.connection.connect` (raw stream replies).
    keys, settings : ``Config.keys`` and ``Config.worker``.
    consumer : this consumer's name in the group.
    """

    service = "Redis"

    def __init__(self, *, client, keys: Keys, settings: WorkerSettings, consumer: str):
        self.client = client
        self.keys = keys
        self.settings = settings
        self.consumer = consumer
        self.describe = f"{keys.comments} as group {keys.group}"
        self.reader = GroupReader(client=client, stream=keys.comments, group=keys.group, consumer=consumer,
                                  batch=settings.batch, block_ms=settings.block_ms,
                                  claim_idle_ms=settings.claim_idle_ms)

    def prepare(self) -> None:
        """Create the group if missing, and go back to this consumer's own pending entries."""
        with redis_errors():
            self.reader.ensure_group()

    def read(self, *, block: bool = True) -> Batch:
        """This consumer's pending entries first (with delivery counts), then new ones."""
        with redis_errors():
            entries, deliveries = self.reader.read(block=block)
        return Batch(entries, deliveries)

    def claim(self):
        """Batches taken over from consumers idle longer than ``claim_idle_ms`` (a generator).

        Entries deleted from the stream before they were scored come back in
        ``Batch.gone``; they are already written to the dead-letter stream.
        """
        claims = self.reader.claim()
        while True:
            with redis_errors():
                claimed = next(claims, None)
                if claimed is None:
                    return
                if claimed.deleted:
                    self._dead_letter_trimmed(claimed.deleted)
                ids = [e.stream_id for e in claimed.entries]
                deliveries = self.reader.deliveries(ids) if ids else None
            yield Batch(claimed.entries, deliveries, claimed=True, gone=list(claimed.deleted))

    def _dead_letter_trimmed(self, stream_ids: Sequence[bytes]) -> None:
        # XAUTOCLAIM already dropped these from the pending list, and only this
        # consumer saw them go, so no XACK guard is needed (or possible).
        pipe = self.client.pipeline(transaction=False)
        for sid in stream_ids:
            pipe.xadd(self.keys.deadletter,
                      {"reason": "trimmed", "detail": TRIMMED_DETAIL, "stream_id": sid, "source": self.keys.comments},
                      maxlen=self.settings.deadletter_maxlen, approximate=True)
        pipe.execute()

    def acknowledge(self, batch: Batch) -> None:
        """Nothing to do: the sink's script acknowledged each entry with its verdict."""

    def lag(self) -> Lag:
        with redis_errors():
            lag = self.reader.lag()
        return Lag(lag.lag, lag.pending)


class RedisStreamSink:
    """Commits a batch read by a :class:`RedisStreamSource` of the same consumer (one Lua call)."""

    def __init__(self, *, client, keys: Keys, settings: WorkerSettings, consumer: str):
        self.client = client
        self.consumer = consumer
        self.committer = BatchCommitter(keys=keys, limits=CommitLimits.from_settings(settings))

    def commit(self, batch: Batch, scored, dead, *, model: str, now: float) -> list[int]:
        with redis_errors():
            return self.committer.commit(self.client, scored, dead, model=model, now=now, consumer=self.consumer)


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
                   observer=None, policies=(), clock=None):
    """A :class:`worker.consumer.StreamConsumer` on Redis Streams: source, sink and state on ``client``.

    ``consumer`` empty means ``settings.consumer`` or ``<hostname>-<pid>``.
    """
    import time

    from worker.consumer import StreamConsumer, default_consumer_name

    name = consumer or settings.consumer or default_consumer_name()
    return StreamConsumer(
        source=RedisStreamSource(client=client, keys=keys, settings=settings, consumer=name),
        sink=RedisStreamSink(client=client, keys=keys, settings=settings, consumer=name),
        state=RedisState(client, keys),
        keys=keys, settings=settings, model_source=model_source, observer=observer, policies=policies,
        clock=clock if clock is not None else time.time,
    )
