"""The transport seam: where comments come from and where verdicts go, behind two small protocols.

The worker loop (:class:`worker.consumer.StreamConsumer`) knows only these:

* a :class:`CommentSource` hands it :class:`Batch` es of raw entries (its own
  unfinished ones first, then new ones), takes over entries another consumer
  left stale, and acknowledges a batch once its verdicts are committed;
* a :class:`VerdictSink` commits a batch's verdicts and dead letters exactly
  once per comment id and text, and says for each whether it was written;
* both raise :class:`TransientError` (and only that) for a failure that
  retrying later may cure: a lost connection, a refused command, a broker
  restart.  The loop catches nothing else from them, backs off with a
  :class:`Backoff`, and prepares the source again.

Two implementations exist: Redis Streams (:mod:`worker.redistransport`, where
the commit and the acknowledgement are one Lua call) and RabbitMQ
(:mod:`worker.amqp`, where the commit lands in Redis first and the message is
acknowledged after it).  In both, Redis holds the state: verdict records,
``done`` markers, the hold queue and the text cache.
"""
from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Protocol, runtime_checkable

from worker.streams import Entry


class TransientError(Exception):
    """A transport failure that may pass: the loop backs off and prepares the source again.

    ``what`` is the log line's subject ("lost connection to Redis"); the
    original exception is chained as ``__cause__``.  ``regroup`` asks the
    source to create its group or queue again (it vanished with the server).
    """

    def __init__(self, what: str, *, regroup: bool = False):
        super().__init__(what)
        self.what = what
        self.regroup = regroup


@dataclass(frozen=True, slots=True)
class Backoff:
    """Capped exponential backoff: ``min(cap_s, base_s * factor ** (failures - 1))``."""

    base_s: float
    factor: float
    cap_s: float

    @classmethod
    def from_settings(cls, settings) -> "Backoff":
        return cls(base_s=settings.backoff_base_s, factor=settings.backoff_factor, cap_s=settings.backoff_cap_s)

    def delay(self, failures: int) -> float:
        return min(self.cap_s, self.base_s * self.factor ** max(0, failures - 1))


@dataclass(slots=True)
class Batch:
    """Entries read together, with their delivery counts when the source knows them.

    ``deliveries`` maps a stream id to how often it was delivered (``None``:
    first delivery for all).  ``token`` is the source's own handle for the
    acknowledgement (AMQP delivery tags); the loop never looks inside it.
    ``gone`` lists entries a claim found deleted before they were scored; the
    source has already dead-lettered them (reason ``trimmed``).  ``dead`` holds
    :class:`worker.validation.DeadLetter` s for messages the source could not
    even turn into an entry (an AMQP body that is not a JSON object); the sink
    writes them with the batch.  ``partition`` is the partition of the comment
    stream the entries came from (:mod:`worker.partitions`), ``None`` for a
    source without partitions; the sink commits the batch to that partition.
    """

    entries: list[Entry]
    deliveries: dict[bytes, int] | None = None
    token: object = None
    claimed: bool = False
    gone: list[bytes] = field(default_factory=list)
    dead: list = field(default_factory=list)
    partition: int | None = None

    def __len__(self) -> int:
        return len(self.entries) + len(self.dead)


@dataclass(slots=True)
class Lag:
    """How far behind the group is: entries not yet delivered (``None`` when unknown) and unacknowledged.

    ``partitions`` is how many stream partitions this worker reads now (its leases), ``None`` for a
    source without partitions.
    """

    lag: int | None
    pending: int
    partitions: int | None = None


@runtime_checkable
class CommentSource(Protocol):
    """Where comments come from.

    ``describe`` names the source in logs; ``consumer`` is this worker's name.
    ``prepare`` creates the group or queue when missing and goes back to this
    consumer's own unfinished entries.  ``read`` returns the next batch (empty
    when nothing came within the blocking time).  ``claim`` yields batches
    taken over from stale consumers (bounded rounds).  ``acknowledge`` is
    called after the sink committed the batch; ``lag`` may return ``None``.
    """

    consumer: str
    describe: str

    def prepare(self) -> None: ...

    def read(self, *, block: bool = True) -> Batch: ...

    def claim(self) -> Iterable[Batch]: ...

    def acknowledge(self, batch: Batch) -> None: ...

    def lag(self) -> Lag | None: ...


@runtime_checkable
class VerdictSink(Protocol):
    """Where verdicts go: ``commit`` writes each comment's verdict once per id and text.

    Returns one code per scored comment, then per dead letter:
    :data:`worker.commit.WRITTEN` or :data:`worker.commit.DUPLICATE`.
    """

    def commit(self, batch: Batch, scored: Sequence, dead: Sequence, *, model: str, now: float) -> list[int]: ...
