"""Redis Streams behind the transport seam: a consumer group in, the one Lua commit out.

:class:`RedisStreamSource` reads the ``comments`` stream as one consumer of
the ``workers`` group: its own pending entries first (left by a crash or a lost
connection), then new ones (``>``); every ``claim_every_s`` it takes over
entries idle longer than ``claim_idle_ms`` on other consumers (XAUTOCLAIM,
at most :data:`MAX_CLAIM_ROUNDS` rounds so fresh entries are never starved).
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

from worker.commit import BatchCommitter, Limits as CommitLimits
from worker.settings import Keys, WorkerSettings
from worker.streams import Entry, parse_xautoclaim, parse_xinfo_group, parse_xpending_range, parse_xreadgroup
from worker.transport import Batch, Lag, TransientError

log = logging.getLogger("seawall.worker")

# Upper bound on XAUTOCLAIM rounds per reclaim pass, so that fresh entries are never starved.
MAX_CLAIM_ROUNDS = 20
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
    """One consumer of ``keys.comments`` in group ``keys.group``; see the module docstring.

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
        self._stream = keys.comments.encode()
        self._backlog_from: bytes | None = b"0"

    def prepare(self) -> None:
        """Create the group if missing, and go back to this consumer's own pending entries."""
        with redis_errors():
            self.ensure_group()
        self._backlog_from = b"0"

    def ensure_group(self) -> None:
        """XGROUP CREATE ... 0 MKSTREAM: entries sent before the first worker started are scored too."""
        try:
            self.client.xgroup_create(self.keys.comments, self.keys.group, id="0", mkstream=True)
            log.info("created consumer group %s on %s", self.keys.group, self.keys.comments)
        except redis.ResponseError as exc:
            if "BUSYGROUP" not in str(exc):
                raise

    def read(self, *, block: bool = True) -> Batch:
        """This consumer's pending entries first (with delivery counts), then new ones."""
        with redis_errors():
            if self._backlog_from is not None:
                entries = self.read_from(self._backlog_from, block=False)
                if entries:
                    self._backlog_from = entries[-1].stream_id
                    return Batch(entries, self.deliveries([e.stream_id for e in entries]))
                self._backlog_from = None
            return Batch(self.read_from(b">", block=block))

    def read_from(self, start: bytes, *, block: bool) -> list[Entry]:
        """One XREADGROUP from ``start`` (``b">"``: new entries; an id: this consumer's pending ones)."""
        args = ["XREADGROUP", "GROUP", self.keys.group, self.consumer, "COUNT", self.settings.batch]
        if block:
            args += ["BLOCK", self.settings.block_ms]
        args += ["STREAMS", self.keys.comments, start]
        return parse_xreadgroup(self.client.execute_command(*args), self._stream)

    def deliveries(self, stream_ids: Sequence[bytes]) -> dict[bytes, int]:
        """Delivery counts of pending entries (XPENDING, one row per id, one round trip)."""
        if not stream_ids:
            return {}
        pipe = self.client.pipeline(transaction=False)
        for sid in stream_ids:
            pipe.execute_command("XPENDING", self.keys.comments, self.keys.group, sid, sid, 1)
        counts = {}
        for reply in pipe.execute():
            for row in parse_xpending_range(reply):
                counts[row.stream_id] = row.deliveries
        return counts

    def claim(self):
        """Batches taken over from consumers idle longer than ``claim_idle_ms`` (a generator).

        Entries deleted from the stream before they were scored come back in
        ``Batch.gone``; they are already written to the dead-letter stream.
        """
        cursor = b"0-0"
        for _ in range(MAX_CLAIM_ROUNDS):
            with redis_errors():
                reply = self.client.execute_command(
                    "XAUTOCLAIM", self.keys.comments, self.keys.group, self.consumer,
                    self.settings.claim_idle_ms, cursor, "COUNT", self.settings.batch,
                )
                claimed = parse_xautoclaim(reply)
                if claimed.deleted:
                    self._dead_letter_trimmed(claimed.deleted)
                deliveries = self.deliveries([e.stream_id for e in claimed.entries]) if claimed.entries else None
            if claimed.entries or claimed.deleted:
                yield Batch(claimed.entries, deliveries, claimed=True, gone=list(claimed.deleted))
            cursor = claimed.cursor
            if cursor in (b"0-0", b"0"):
                break

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
            reply = self.client.execute_command("XINFO GROUPS", self.keys.comments)
        info = parse_xinfo_group(reply, self.keys.group)
        return Lag(info["lag"], info["pending"])


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
    """The state port of the batch policies: the Redis client they keep their state in.

    :meth:`guard` turns a lost connection during a policy into a
    :class:`TransientError`, so that the batch is read again; any other error
    stays a policy bug (logged, decisions kept).
    """

    def __init__(self, client):
        self.client = client

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
        state=RedisState(client),
        keys=keys, settings=settings, model_source=model_source, observer=observer, policies=policies,
        clock=clock if clock is not None else time.time,
    )
