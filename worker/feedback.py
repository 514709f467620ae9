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
between reading and EXEC leaves it pending to be read again.  Parsing and the
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
from worker.labels import LabelRecord, append_label, parse_label
from worker.settings import Keys
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


def held_key(keys: Keys) -> str:
    return keys.held


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
    pipe.xadd(keys.deadletter, entry, maxlen=maxlen, approximate=True)
    if pipeline is None:
        return pipe.execute()
    return None


def parse_read_reply(reply) -> list[tuple[str, dict]]:
    """Flatten an XREADGROUP/XAUTOCLAIM reply into ``[(stream_id, fields)]`` (pure).

    Entries deleted while pending come back with ``None`` fields; they are
    kept with an empty map so that they are acknowledged, not read forever.
    """
    out = []
    for _stream, entries in reply or ():
        out.extend(parse_entries(entries))
    return out


def _field_map(fields) -> dict:
    # redis-py folds fields into a dict; a client with raw stream replies
    # (worker.connection) gives the wire's flat [k1, v1, k2, v2, ...] list.
    if fields is None:
        return {}
    if isinstance(fields, Mapping):
        return dict(fields)
    flat = list(fields)
    return dict(zip(flat[0::2], flat[1::2]))


def parse_entries(entries) -> list[tuple[str, dict]]:
    """``[(id, fields)]`` of one stream's entries, parsed or raw (pure)."""
    return [(_raw(sid).decode(), _field_map(fields)) for sid, fields in entries or ()]


# Constructor parameters of FeedbackConsumer: (type, lowest, highest); None = unbounded.
_PARAMS = {
    "group": (str, None, None),
    "consumer": (str, None, None),
    "batch": (int, 1, 100000),
    "block_ms": (int, 1, 600000),
    "text_max_bytes": (int, 1, 64 * 2**20),
    "labels_max": (int, 1, 10**8),
    "claim_idle_ms": (int, 0, 86400000),
    "deadletter_maxlen": (int, 1, 10**9),
    "backoff_initial_s": (float, 0.001, 60.0),
    "backoff_factor": (float, 1.0, 10.0),
    "backoff_cap_s": (float, 0.001, 3600.0),
}


def _check(name: str, value):
    tp, low, high = _PARAMS[name]
    ok_type = isinstance(value, tp) and not isinstance(value, bool)
    if tp is float and isinstance(value, int) and not isinstance(value, bool):
        ok_type = True
    if not ok_type or (low is not None and value < low) or (high is not None and value > high):
        raise ValueError(f"FeedbackConsumer: bad {name}={value!r}")


class FeedbackConsumer:
    """Consumer-group reader of the feedback stream that writes the labelled store.

    Parameters
    ----------
    client : redis.Redis
    keys : the deployment's :class:`Keys`.
    group : consumer group name on the feedback stream.
    consumer : consumer name; empty means ``<hostname>-<pid>-feedback``.
    batch, block_ms : entries per read and how long a read blocks.
    text_max_bytes : largest text a label may carry.
    labels_max : bound of the labelled store.
    deadletter_maxlen : approximate cap of the dead-letter stream (``worker.deadletter_maxlen``).
    claim_idle_ms : :meth:`drain` claims entries pending this long on other consumers.
    backoff_initial_s, backoff_factor, backoff_cap_s : reconnect back-off of :meth:`run`.
    observer : optional :class:`worker.observer.WorkerObserver`; gets ``on_deadletter(reason)``
        for each dead-lettered feedback entry and ``on_reconnect()``.
    clock : returns epoch seconds (tests pass a fixed one).
    """

    def __init__(self, *, client, keys: Keys, group: str = "labellers", consumer: str = "",
                 batch: int = 256, block_ms: int = 1000, text_max_bytes: int = 262144,
                 labels_max: int = 200000, claim_idle_ms: int = 60000, deadletter_maxlen: int = 100_000,
                 backoff_initial_s: float = 0.1, backoff_factor: float = 2.0,
                 backoff_cap_s: float = 10.0, observer=None, clock=time.time):
        for name, value in (("group", group), ("consumer", consumer), ("batch", batch),
                            ("block_ms", block_ms), ("text_max_bytes", text_max_bytes),
                            ("labels_max", labels_max), ("claim_idle_ms", claim_idle_ms),
                            ("deadletter_maxlen", deadletter_maxlen),
                            ("backoff_initial_s", backoff_initial_s), ("backoff_factor", backoff_factor),
                            ("backoff_cap_s", backoff_cap_s)):
            _check(name, value)
        if not group:
            raise ValueError("FeedbackConsumer: bad group=''")
        self.client = client
        self.keys = keys
        self.group = group
        self.consumer = consumer or f"{socket.gethostname()}-{os.getpid()}-feedback"
        self.batch = batch
        self.block_ms = block_ms
        self.text_max_bytes = text_max_bytes
        self.labels_max = labels_max
        self.claim_idle_ms = claim_idle_ms
        self.deadletter_maxlen = deadletter_maxlen
        self.backoff_initial_s = float(backoff_initial_s)
        self.backoff_factor = float(backoff_factor)
        self.backoff_cap_s = float(backoff_cap_s)
        self.observer = observer
        self.clock = clock
        self._group_ready = False
        self._own_pending_done = False
        self._deadletter_log = DeadLetterLog(logger=log, source=keys.feedback, deadletter=keys.deadletter)

    # -- Redis -----------------------------------------------------------------
    def ensure_group(self) -> None:
        """Create the consumer group (from the stream's start) if it is missing."""
        try:
            self.client.xgroup_create(self.keys.feedback, self.group, id="0", mkstream=True)
        except redis.exceptions.ResponseError as exc:
            if "BUSYGROUP" not in str(exc):
                raise
        self._group_ready = True

    def _read(self, block_ms: int | None) -> list[tuple[str, dict]]:
        if not self._own_pending_done:
            # Entries this consumer read before a crash or reconnect come first.
            entries = parse_read_reply(self.client.xreadgroup(
                self.group, self.consumer, {self.keys.feedback: "0"}, count=self.batch))
            if entries:
                return entries
            self._own_pending_done = True
        return parse_read_reply(self.client.xreadgroup(
            self.group, self.consumer, {self.keys.feedback: ">"}, count=self.batch, block=block_ms))

    def handle(self, entries: list[tuple[str, dict]]) -> dict[str, int]:
        """Label or dead-letter ``entries`` and ack them, all in one MULTI."""
        if not entries:
            return {"labelled": 0, "deadlettered": 0}
        parsed = [parse_feedback(sid, fields, text_max_bytes=self.text_max_bytes) for sid, fields in entries]
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
        pipe = self.client.pipeline(transaction=True)
        for (_sid, sent), item in zip(entries, parsed):
            if isinstance(item, Feedback):
                item = join_label(item, cached.get(item.stream_id), now=now, text_max_bytes=self.text_max_bytes)
                if isinstance(item, Rejected):
                    item = dataclasses.replace(item, fields=_printable(sent))  # every field the moderator sent
            if isinstance(item, Rejected):
                write_deadletter(self.client, self.keys, item, maxlen=self.deadletter_maxlen, pipeline=pipe)
                counts["deadlettered"] += 1
                dead.append(item)
            else:
                append_label(self.client, self.keys, item, labels_max=self.labels_max, pipeline=pipe)
                pipe.zrem(held_key(self.keys), item.id)
                counts["labelled"] += 1
        pipe.xack(self.keys.feedback, self.group, *[sid for sid, _ in entries])
        pipe.execute()
        for item in dead:
            self._deadletter_log.add(item.reason, item.detail)
            if self.observer is not None:
                self.observer.on_deadletter(item.reason)
        return counts

    def step(self, *, block_ms: int | None = None) -> int:
        """Read and handle one batch; returns how many entries it handled.

        ``block_ms=None`` uses the consumer's own ``block_ms``; ``0`` does not block.
        An empty read is a normal outcome and returns 0.
        """
        if not self._group_ready:
            self.ensure_group()
        self._deadletter_log.flush()
        wait = self.block_ms if block_ms is None else block_ms
        try:
            entries = self._read(wait or None)
        except redis.exceptions.ResponseError as exc:
            if "NOGROUP" not in str(exc):
                raise
            # The stream or group vanished (a Redis restart without persistence).
            self._group_ready = False
            self._own_pending_done = False
            return 0
        self.handle(entries)
        return len(entries)

    def claim_stale(self) -> list[tuple[str, dict]]:
        """Claim entries pending longer than ``claim_idle_ms`` on other consumers."""
        claimed: list[tuple[str, dict]] = []
        start = "0-0"
        while True:
            reply = self.client.xautoclaim(self.keys.feedback, self.group, self.consumer,
                                           min_idle_time=self.claim_idle_ms, start_id=start, count=self.batch)
            cursor, entries = reply[0], reply[1]
            claimed.extend(parse_entries(entries))
            start = _raw(cursor).decode()
            if start == "0-0":
                return claimed

    def drain(self, *, max_batches: int = 10000) -> int:
        """Handle every feedback entry available now, without blocking (retrain's first step)."""
        if not self._group_ready:
            self.ensure_group()
        total = 0
        stale = self.claim_stale()
        for i in range(0, len(stale), self.batch):
            self.handle(stale[i:i + self.batch])
            total += len(stale[i:i + self.batch])
        for _ in range(max_batches):
            n = self.step(block_ms=0)
            if n == 0 and self._own_pending_done:
                break
            total += n
        return total

    def run(self, stop: threading.Event, *, on_reconnect=None) -> None:
        """Consume until ``stop`` is set; reconnects back off (capped, exponential)."""
        delay = self.backoff_initial_s
        while not stop.is_set():
            try:
                self.step()
                delay = self.backoff_initial_s
            except (redis.exceptions.ConnectionError, redis.exceptions.TimeoutError) as exc:
                log.warning("feedback: Redis unavailable (%s); retrying in %.2fs", type(exc).__name__, delay)
                self._own_pending_done = False
                if on_reconnect is not None:
                    on_reconnect()
                elif self.observer is not None:
                    self.observer.on_reconnect()
                stop.wait(delay)
                delay = min(delay * self.backoff_factor, self.backoff_cap_s)
