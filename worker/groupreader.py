"""One reader of a Redis stream inside a consumer group, for every stream Seawall consumes.

:class:`GroupReader` does what both the comment worker and the feedback
consumer need, once, on top of the pure parsers of :mod:`worker.streams`:

* create the group if missing (``XGROUP CREATE ... 0 MKSTREAM``: entries sent
  before the first consumer started are read too);
* read this consumer's own pending entries first (left by a crash or a lost
  connection), then new ones (``>``);
* count deliveries of pending entries (``XPENDING``), for poison detection;
* take over entries idle on other consumers (``XAUTOCLAIM``), at most
  :data:`MAX_CLAIM_ROUNDS` rounds per pass so that fresh entries are never starved;
* report the group's lag and pending count.

Redis errors are raised as they come; the caller decides what they mean
(:mod:`worker.redistransport` turns them into ``TransientError``).  Replies may
be raw (:func:`worker.connection.raw_stream_replies`) or parsed by redis-py.
"""
from __future__ import annotations

import logging
from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import redis

from model.params import integer, nonempty, set_params
from worker.streams import Claimed, Entry, parse_xautoclaim, parse_xinfo_group, parse_xpending_range, parse_xreadgroup

log = logging.getLogger("seawall.worker")

# Upper bound on XAUTOCLAIM rounds per reclaim pass, so that fresh entries are never starved.
MAX_CLAIM_ROUNDS = 20

# Constructor parameters: (lowest, highest) of each number.
_PARAMS = {"stream": nonempty(), "group": nonempty(), "consumer": nonempty(), "batch": integer(1, 100_000),
           "block_ms": integer(0, 600_000), "claim_idle_ms": integer(0, 86_400_000)}


@dataclass(frozen=True, slots=True)
class GroupLag:
    """Entries not yet delivered to the group (``None`` before Redis 7) and entries delivered but unacknowledged."""

    lag: int | None
    pending: int


class GroupReader:
    """Reads ``stream`` as ``consumer`` of ``group``; see the module docstring.

    Parameters
    ----------
    client : a redis-py client.
    stream, group, consumer : the stream, its consumer group, and this reader's name in it.
    batch : entries per read and per claim round.
    block_ms : how long a blocking read of new entries waits.
    claim_idle_ms : entries idle this long on another consumer are taken over by :meth:`claim`.
    """

    def __init__(self, *, client, stream: str, group: str, consumer: str, batch: int, block_ms: int,
                 claim_idle_ms: int):
        set_params(self, _PARAMS, locals())
        self.client = client
        self._stream = stream.encode()
        self._backlog_from: bytes | None = b"0"

    def ensure_group(self) -> None:
        """Create the group from the stream's start if it is missing; go back to this consumer's own backlog."""
        try:
            self.client.xgroup_create(self.stream, self.group, id="0", mkstream=True)
            log.info("created consumer group %s on %s", self.group, self.stream)
        except redis.ResponseError as exc:
            if "BUSYGROUP" not in str(exc):
                raise
        self.restart()

    def restart(self) -> None:
        """Read this consumer's own pending entries again before new ones (after a reconnect)."""
        self._backlog_from = b"0"

    @property
    def backlog_done(self) -> bool:
        """True once this consumer's own pending entries have all been read since the last restart."""
        return self._backlog_from is None

    def read(self, *, block: bool = True, count_deliveries: bool = True,
             block_ms: int | None = None) -> tuple[list[Entry], dict[bytes, int] | None]:
        """The next entries: own pending ones first (with their delivery counts), then new ones.

        Returns ``(entries, deliveries)``; ``deliveries`` is ``None`` for new
        entries (first delivery) or when ``count_deliveries`` is false.
        ``block_ms`` shortens this one read's wait (a worker reading several
        partitions blocks briefly on each).
        """
        if self._backlog_from is not None:
            entries = self.read_from(self._backlog_from, block=False)
            if entries:
                self._backlog_from = entries[-1].stream_id
                counts = self.deliveries([e.stream_id for e in entries]) if count_deliveries else None
                return entries, counts
            self._backlog_from = None
        return self.read_from(b">", block=block, block_ms=block_ms), None

    def read_from(self, start: bytes, *, block: bool, block_ms: int | None = None) -> list[Entry]:
        """One XREADGROUP from ``start`` (``b">"``: new entries; an id: this consumer's pending ones after it)."""
        args = ["XREADGROUP", "GROUP", self.group, self.consumer, "COUNT", self.batch]
        wait = self.block_ms if block_ms is None else min(self.block_ms, block_ms)
        if block and wait > 0:
            args += ["BLOCK", wait]
        args += ["STREAMS", self.stream, start]
        return parse_xreadgroup(self.client.execute_command(*args), self._stream)

    def deliveries(self, stream_ids: Sequence[bytes]) -> dict[bytes, int]:
        """Delivery counts of pending entries (XPENDING, one row per id, one round trip)."""
        if not stream_ids:
            return {}
        pipe = self.client.pipeline(transaction=False)
        for sid in stream_ids:
            pipe.execute_command("XPENDING", self.stream, self.group, sid, sid, 1)
        counts = {}
        for reply in pipe.execute():
            for row in parse_xpending_range(reply):
                counts[row.stream_id] = row.deliveries
        return counts

    def claim(self, *, rounds: int = MAX_CLAIM_ROUNDS) -> Iterator[Claimed]:
        """Take over entries idle longer than ``claim_idle_ms``: one :class:`Claimed` per round with something in it.

        ``Claimed.deleted`` lists entries deleted from the stream while pending:
        XAUTOCLAIM has already dropped them from the pending list.
        """
        cursor = b"0-0"
        for _ in range(rounds):
            reply = self.client.execute_command("XAUTOCLAIM", self.stream, self.group, self.consumer,
                                                self.claim_idle_ms, cursor, "COUNT", self.batch)
            claimed = parse_xautoclaim(reply)
            if claimed.entries or claimed.deleted:
                yield claimed
            cursor = claimed.cursor
            if cursor in (b"0-0", b"0"):
                return

    def lag(self) -> GroupLag:
        return group_lag(self.client, self.stream, self.group)


def group_lag(client, stream: str, group: str) -> GroupLag:
    """Lag and pending count of ``group`` on ``stream``, read without creating either.

    A stream that does not exist yet has nothing waiting (lag 0); a group that
    does not exist yet, or a Redis before 7, gives an unknown lag (None).
    """
    try:
        reply = client.execute_command("XINFO GROUPS", stream)
    except redis.ResponseError as exc:
        if "no such key" in str(exc).lower():
            return GroupLag(0, 0)
        raise
    info = parse_xinfo_group(reply, group)
    return GroupLag(info["lag"], info["pending"])
