"""Moderators' feedback in: the feedback stream becomes the labelled store.

A moderator (or a script) XADDs ``{id, label, [moderator], [reason], [text]}``
to the ``feedback`` stream.  A consumer group reads it, joins each label to the
comment text the worker cached under ``text:{id}`` (or to the ``text`` the
entry carries), and in ONE MULTI per batch:

* appends the label record to the bounded ``labels`` stream (oldest trimmed),
* removes the comment from the ``held`` queue (a moderator decided it),
* or dead-letters malformed feedback and feedback whose text is unavailable,
* and acknowledges every entry it handled.

So an entry is either labelled or dead-lettered, never lost, and a crash
between reading and EXEC leaves it pending to be read again.  Reading (own
pending entries first, new ones, taking over stale ones) is the
:class:`worker.groupreader.GroupReader` every consumer group uses.  Parsing and the
join are pure functions, tested without a server.  A dead letter keeps every
field the moderator sent (a name Seawall writes itself, such as the
moderator's ``reason`` note, is kept as ``orig_<name>``) and adds ``reason``,
``detail``, ``stream_id`` and ``source``.

The label record and the labelled store live in :mod:`worker.labels`.
"""
from __future__ import annotations

import dataclasses
import logging
import os
import socket
import threading
import time
from collections.abc import Mapping
from dataclasses import dataclass

import redis

from worker.deadletters import DeadLetterLog
from worker.groupreader import GroupReader
from worker.labels import LabelRecord, append_label, parse_label
from worker.settings import FeedbackSettings, Keys
from worker.transport import Backoff
from worker.validation import RESERVED, field_names, shown_name

log = logging.getLogger(__name__)

ID_MAX_BYTES = 256
NAME_MAX_BYTES = 128
REASON_MAX_BYTES = 1024
MAX_FIELDS = 16
DEADLETTER_VALUE_BYTES = 1024


@dataclass(frozen=True)
class Feedback:
    """One valid feedback entry; ``text`` is None when it must come from the cache."""

    stream_id: str
    id: str
    label: str
    moderator: str = ""
    reason: str = ""
    text: str | None = None


@dataclass(frozen=True)
class Rejected:
    """A feedback entry that goes to the dead-letter stream, with its reason and what is wrong.

    ``detail`` names fields and sizes, never values: it is also logged.
    """

    stream_id: str
    reason: str
    fields: Mapping[str, str]
    detail: str = ""


def held_key(keys: Keys, comment_id: str) -> str:
    """The hold queue a comment would be in: its partition's."""
    return keys.part_of(comment_id).held


def text_key(keys: Keys, comment_id: str) -> str:
    return keys.text(comment_id)


def _raw(value) -> bytes:
    return value if isinstance(value, bytes) else str(value).encode("utf-8", "surrogatepass")


def _printable(fields: Mapping) -> dict[str, str]:
    """Fields as strings for the dead-letter entry: invalid UTF-8 replaced, values truncated."""
    out = {}
    for k, v in fields.items():
        key = _raw(k).decode("utf-8", "replace")[:64]
        out[key] = _raw(v)[:DEADLETTER_VALUE_BYTES].decode("utf-8", "replace")
    return out


def parse_feedback(stream_id, fields: Mapping, *, text_max_bytes: int) -> Feedback | Rejected:
    """Validate one feedback entry (pure).

    Returns a :class:`Feedback`, or a :class:`Rejected` with a reason:
    ``feedback_too_many_fields``, ``feedback_invalid_utf8``,
    ``feedback_missing_id``, ``feedback_bad_id`` (too long),
    ``feedback_unknown_label`` (missing, or not spam, ham, 1 or 0),
    ``feedback_text_too_large``, ``feedback_bad_field`` (moderator or reason too long).
    """
    sid = _raw(stream_id).decode("utf-8", "replace")

    def rejected(reason: str, detail: str) -> Rejected:
        return Rejected(sid, reason, _printable(fields), detail)

    if len(fields) > MAX_FIELDS:
        return rejected("feedback_too_many_fields", f"{len(fields)} fields, limit {MAX_FIELDS}")
    decoded: dict[str, str] = {}
    sizes: dict[str, int] = {}
    for k, v in fields.items():
        try:
            key = _raw(k).decode("utf-8")
            raw = _raw(v)
            value = raw.decode("utf-8")
        except UnicodeDecodeError:
            return rejected("feedback_invalid_utf8",
                            f"field {shown_name(_raw(k).decode('utf-8', 'replace'))} is not valid UTF-8")
        decoded[key] = value
        sizes[key] = len(raw)
    comment_id = decoded.get("id", "").strip()
    if not comment_id:
        return rejected("feedback_missing_id", "required field 'id' is missing or empty; "
                        + field_names(decoded, wanted="id" if "id" not in decoded else ""))
    if sizes.get("id", 0) > ID_MAX_BYTES:
        return rejected("feedback_bad_id", f"id is {sizes['id']} bytes, limit {ID_MAX_BYTES}")
    try:
        label = parse_label(decoded.get("label", ""))
    except ValueError:
        what = ("is missing; " + field_names(decoded, wanted="label")) if "label" not in decoded else \
            f"must be spam, ham, 1 or 0 (got {sizes['label']} bytes of something else)"
        return rejected("feedback_unknown_label", f"label {what}")
    if sizes.get("moderator", 0) > NAME_MAX_BYTES:
        return rejected("feedback_bad_field", f"moderator is {sizes['moderator']} bytes, limit {NAME_MAX_BYTES}")
    if sizes.get("reason", 0) > REASON_MAX_BYTES:
        return rejected("feedback_bad_field", f"reason is {sizes['reason']} bytes, limit {REASON_MAX_BYTES}")
    text = decoded.get("text")
    if text is not None and sizes["text"] > text_max_bytes:
        return rejected("feedback_text_too_large", f"text is {sizes['text']} bytes, "
                                                   f"limit {text_max_bytes} (retrain.feedback_text_max_bytes)")
    if text is not None and not text.strip():
        text = None  # an empty text means "use the cache"
    return Feedback(
        stream_id=sid,
        id=comment_id,
        label=label,
        moderator=decoded.get("moderator", "").strip(),
        reason=decoded.get("reason", "").strip(),
        text=text,
    )


def join_label(fb: Feedback, cached: Mapping | None, *, now: float, text_max_bytes: int,
               source: str = "feedback") -> LabelRecord | Rejected:
    """The label record for ``fb`` joined to the cached comment (pure).

    ``cached`` is the ``text:{id}`` hash (bytes or str keys), or None/empty when
    the cache has no entry.  The entry's own text wins over the cache; the site
    comes from the cache when it has one.  A :class:`Rejected` carries the
    fields parsed from the entry; :meth:`FeedbackConsumer.handle` dead-letters
    the entry's own fields, every one the moderator sent.
    """
    cache = {_raw(k).decode("utf-8", "replace"): v for k, v in (cached or {}).items()}
    fields = {k: v for k, v in (("id", fb.id), ("label", fb.label), ("moderator", fb.moderator),
                                ("reason", fb.reason), ("text", fb.text)) if v}
    text = fb.text
    if text is None and cache.get("text") is not None:
        raw = _raw(cache["text"])
        if len(raw) > text_max_bytes:
            return Rejected(fb.stream_id, "feedback_text_too_large", fields,
                            f"the cached text is {len(raw)} bytes, limit {text_max_bytes} "
                            "(retrain.feedback_text_max_bytes)")
        text = raw.decode("utf-8", "replace")
    if text is None or not text.strip():
        return Rejected(fb.stream_id, "feedback_no_text", fields,
                        "the feedback has no text and none is cached for this id (the worker never scored it, "
                        "or its text expired after worker.text_cache_ttl_s); send the text with the label")
    site = _raw(cache.get("site", b"")).decode("utf-8", "replace")
    return LabelRecord(id=fb.id, text=text, label=fb.label, moderator=fb.moderator, reason=fb.reason, site=site,
                       ts=f"{now:.3f}", source=source, feedback_id=fb.stream_id)


def write_deadletter(client, keys: Keys, rejected: Rejected, *, maxlen: int = 100_000, pipeline=None):
    """Dead-letter one feedback entry: every field it had (values cut), its reason and detail.

    A field named like one Seawall writes (``reason``, ``detail``, ``stream_id``,
    ``source``, ``truncated``) is kept as ``orig_<name>``, as in comment dead letters.
    """
    pipe = pipeline if pipeline is not None else client.pipeline(transaction=True)
    entry = {"reason": rejected.reason, "detail": rejected.detail, "stream_id": rejected.stream_id,
             "source": keys.feedback}
    for name, value in rejected.fields.items():
        key = f"orig_{name}" if name in RESERVED else name
        while key in entry:
            key = "orig_" + key
        entry[key] = value
    pipe.xadd(keys.feedback_deadletter, entry, maxlen=maxlen, approximate=True)
    if pipeline is None:
        return pipe.execute()
    return None


class FeedbackConsumer:
    """The feedback stream's handler on a :class:`worker.groupreader.GroupReader`: labels in, labelled store out.

    Parameters
    ----------
    client : redis.Redis
    keys : the deployment's :class:`Keys`.
    settings : :class:`worker.settings.FeedbackSettings` (``ops.labelling.feedback_settings`` builds them
        from the Config, for ``seawall serve`` and the retrain's drain alike).
    consumer : consumer name; empty means ``<hostname>-<pid>-feedback``.
    observer : optional :class:`worker.observer.WorkerObserver`; gets ``on_deadletter(reason)``
        for each dead-lettered feedback entry and ``on_reconnect()``.
    clock : returns epoch seconds (tests pass a fixed one).
    """

    def __init__(self, *, client, keys: Keys, settings: FeedbackSettings = FeedbackSettings(), consumer: str = "",
                 observer=None, clock=time.time):
        if not isinstance(settings, FeedbackSettings):
            raise ValueError(f"FeedbackConsumer: settings must be FeedbackSettings, got {type(settings).__name__}")
        self.client = client
        self.keys = keys
        self.settings = settings
        self.consumer = consumer or f"{socket.gethostname()}-{os.getpid()}-feedback"
        self.observer = observer
        self.clock = clock
        self.reader = GroupReader(client=client, stream=keys.feedback, group=settings.group, consumer=self.consumer,
                                  batch=settings.batch, block_ms=settings.block_ms,
                                  claim_idle_ms=settings.claim_idle_ms)
        self._backoff = Backoff(base_s=settings.backoff_initial_s, factor=settings.backoff_factor,
                                cap_s=settings.backoff_cap_s)
        self._group_ready = False
        self._deadletter_log = DeadLetterLog(logger=log, source=keys.feedback,
                                             deadletter=keys.feedback_deadletter)

    # -- Redis -----------------------------------------------------------------
    def ensure_group(self) -> None:
        """Create the consumer group (from the stream's start) if it is missing."""
        self.reader.ensure_group()
        self._group_ready = True

    def handle(self, entries: list[tuple[str, dict]]) -> dict[str, int]:
        """Label or dead-letter ``entries`` (``(stream_id, fields)``) and ack them in one MULTI on the shared keys.

        The labelled comments leave their partitions' hold queues first (an
        idempotent ZREM each, so a crash before the MULTI only repeats it).
        """
        if not entries:
            return {"labelled": 0, "deadlettered": 0}
        s = self.settings
        parsed = [parse_feedback(sid, fields, text_max_bytes=s.text_max_bytes) for sid, fields in entries]
        valid = [p for p in parsed if isinstance(p, Feedback)]
        cached = {}
        if valid:
            lookup = self.client.pipeline(transaction=False)
            for fb in valid:
                lookup.hmget(text_key(self.keys, fb.id), ["text", "site"])
            for fb, (text, site) in zip(valid, lookup.execute()):
                cached[fb.stream_id] = {k: v for k, v in (("text", text), ("site", site)) if v is not None}
        now = self.clock()
        counts = {"labelled": 0, "deadlettered": 0}
        dead = []
        joined = []
        for (_sid, sent), item in zip(entries, parsed):
            if isinstance(item, Feedback):
                item = join_label(item, cached.get(item.stream_id), now=now, text_max_bytes=s.text_max_bytes)
                if isinstance(item, Rejected):
                    item = dataclasses.replace(item, fields=_printable(sent))  # every field the moderator sent
            joined.append(item)
        decided = [item.id for item in joined if not isinstance(item, Rejected)]
        if decided:
            release = self.client.pipeline(transaction=False)
            for comment_id in decided:
                release.zrem(held_key(self.keys, comment_id), comment_id)
            release.execute()
        pipe = self.client.pipeline(transaction=True)
        for item in joined:
            if isinstance(item, Rejected):
                write_deadletter(self.client, self.keys, item, maxlen=s.deadletter_maxlen, pipeline=pipe)
                counts["deadlettered"] += 1
                dead.append(item)
            else:
                append_label(self.client, self.keys, item, labels_max=s.labels_max, pipeline=pipe)
                counts["labelled"] += 1
        pipe.xack(self.keys.feedback, s.group, *[sid for sid, _ in entries])
        pipe.execute()
        for item in dead:
            self._deadletter_log.add(item.reason, item.detail)
            if self.observer is not None:
                self.observer.on_deadletter(item.reason)
        return counts

    def step(self, *, block: bool = True) -> int:
        """Read and handle one batch (own pending entries first); returns how many entries it handled.

        ``block=False`` does not wait for new entries.  An empty read is a
        normal outcome and returns 0.
        """
        if not self._group_ready:
            self.ensure_group()
        self._deadletter_log.flush()
        try:
            entries, _ = self.reader.read(block=block, count_deliveries=False)
        except redis.exceptions.ResponseError as exc:
            if "NOGROUP" not in str(exc):
                raise
            # The stream or group vanished (a Redis restart without persistence).
            self._group_ready = False
            return 0
        self.handle(_pairs(entries))
        return len(entries)

    def drain(self, *, max_batches: int = 10000) -> int:
        """Handle every feedback entry available now, without blocking (retrain's first step).

        Entries pending on other consumers for ``claim_idle_ms`` are taken over first.
        """
        if not self._group_ready:
            self.ensure_group()
        total = 0
        for claimed in self.reader.claim(rounds=max_batches):
            # Entries deleted while pending were dropped by XAUTOCLAIM itself: they never were labels.
            self.handle(_pairs(claimed.entries))
            total += len(claimed.entries)
        for _ in range(max_batches):
            n = self.step(block=False)
            if n == 0 and self.reader.backlog_done:
                break
            total += n
        return total

    def run(self, stop: threading.Event, *, on_reconnect=None) -> None:
        """Consume until ``stop`` is set; reconnects back off (capped, exponential)."""
        failures = 0
        while not stop.is_set():
            try:
                self.step()
                failures = 0
            except (redis.exceptions.ConnectionError, redis.exceptions.TimeoutError) as exc:
                failures += 1
                delay = self._backoff.delay(failures)
                log.warning("feedback: Redis unavailable (%s); retrying in %.2fs", type(exc).__name__, delay)
                self.reader.restart()
                if on_reconnect is not None:
                    on_reconnect()
                elif self.observer is not None:
                    self.observer.on_reconnect()
                stop.wait(delay)


def _pairs(entries) -> list[tuple[str, dict]]:
    """Entries as ``(stream_id, fields)``; one deleted while pending has no fields and is dead-lettered."""
    return [(e.stream_id.decode(), dict(e.fields or ())) for e in entries]
