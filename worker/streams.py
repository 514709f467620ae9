"""Pure parsing of the stream replies the worker reads, with no Redis in sight.

The worker's client leaves these replies raw (see :func:`worker.connection.raw_stream_replies`),
so the functions here see what the server sent, as bytes: every field in its
order, duplicate field names included, invalid UTF-8 untouched.  They accept
both the RESP2 shape (arrays) and the RESP3 shape (a map from stream name to
entries) of XREADGROUP.  A reply that is not of the expected shape raises
:class:`StreamReplyError`; an entry that is merely odd (deleted, odd field
count) is returned as such for :mod:`worker.validation` to dead-letter.
"""
from __future__ import annotations

from dataclasses import dataclass


class StreamReplyError(ValueError):
    """A server reply did not have the shape its command documents."""


@dataclass(frozen=True, slots=True)
class Entry:
    """One stream entry as delivered.

    ``fields`` is the flat list of (name, value) pairs in wire order, or
    ``None`` when the entry was deleted (trimmed) after being delivered.
    ``odd`` is true when the server sent an odd number of field items.
    """

    stream_id: bytes
    fields: tuple[tuple[bytes, bytes], ...] | None
    odd: bool = False


@dataclass(frozen=True, slots=True)
class Pending:
    """One row of the extended XPENDING reply."""

    stream_id: bytes
    consumer: bytes
    idle_ms: int
    deliveries: int


@dataclass(frozen=True, slots=True)
class Claimed:
    """The XAUTOCLAIM reply: where to continue, what was claimed, what was gone."""

    cursor: bytes
    entries: list[Entry]
    deleted: list[bytes]


def _as_bytes(value, what: str) -> bytes:
    if isinstance(value, bytes):
        return value
    if isinstance(value, str):
        return value.encode()
    raise StreamReplyError(f"stream reply: {what} should be a bulk string, got {type(value).__name__}")


def parse_entry(raw) -> Entry:
    """``[id, [f1, v1, f2, v2, ...]]`` (or ``[id, nil]`` for a deleted entry) -> :class:`Entry`."""
    if not isinstance(raw, (list, tuple)) or len(raw) != 2:
        raise StreamReplyError(f"stream reply: an entry should be [id, fields], got {raw!r:.80}")
    stream_id = _as_bytes(raw[0], "entry id")
    flat = raw[1]
    if flat is None:
        return Entry(stream_id, None)
    if isinstance(flat, dict):  # some servers and fakes hand fields over as a map
        return Entry(stream_id, tuple((_as_bytes(k, "field"), _as_bytes(v, "value")) for k, v in flat.items()))
    if not isinstance(flat, (list, tuple)):
        raise StreamReplyError(f"stream reply: entry {stream_id!r} fields should be an array")
    odd = len(flat) % 2 == 1
    if not odd and all(type(x) is bytes for x in flat):  # the usual case, kept cheap
        return Entry(stream_id, tuple(zip(flat[::2], flat[1::2])))
    pairs = tuple(
        (_as_bytes(flat[i], "field"), _as_bytes(flat[i + 1], "value")) for i in range(0, len(flat) - 1, 2)
    )
    return Entry(stream_id, pairs, odd)


def parse_entries(raw) -> list[Entry]:
    if raw is None:
        return []
    if not isinstance(raw, (list, tuple)):
        raise StreamReplyError("stream reply: entries should be an array")
    return [parse_entry(item) for item in raw]


def parse_xreadgroup(reply, stream: bytes | str) -> list[Entry]:
    """Entries of ``stream`` in an XREADGROUP reply; ``None`` (the BLOCK timed out) gives ``[]``.

    An empty read is a normal outcome, not an error.
    """
    if reply is None:
        return []
    want = _as_bytes(stream, "stream name")
    if isinstance(reply, dict):
        items = reply.items()
    elif isinstance(reply, (list, tuple)):
        items = []
        for item in reply:
            if not isinstance(item, (list, tuple)) or len(item) != 2:
                raise StreamReplyError("XREADGROUP reply: each stream should be [name, entries]")
            items.append((item[0], item[1]))
    else:
        raise StreamReplyError(f"XREADGROUP reply: unexpected {type(reply).__name__}")
    out: list[Entry] = []
    for name, entries in items:
        if _as_bytes(name, "stream name") == want:
            out.extend(parse_entries(entries))
    return out


def parse_xautoclaim(reply) -> Claimed:
    """``[cursor, entries]`` (Redis 6.2) or ``[cursor, entries, deleted_ids]`` (7.0+)."""
    if not isinstance(reply, (list, tuple)) or len(reply) not in (2, 3):
        raise StreamReplyError(f"XAUTOCLAIM reply: expected [cursor, entries, deleted], got {reply!r:.80}")
    cursor = _as_bytes(reply[0], "cursor")
    entries = parse_entries(reply[1])
    deleted = [_as_bytes(x, "deleted id") for x in reply[2]] if len(reply) == 3 and reply[2] else []
    # Redis 6.2 reports a claimed-but-deleted entry inline with nil fields.
    deleted += [e.stream_id for e in entries if e.fields is None]
    return Claimed(cursor, [e for e in entries if e.fields is not None], deleted)


def parse_xpending_range(reply) -> list[Pending]:
    """Rows of ``XPENDING key group [IDLE ms] start end count [consumer]``."""
    if reply is None:
        return []
    if not isinstance(reply, (list, tuple)):
        raise StreamReplyError("XPENDING reply: expected an array of rows")
    rows = []
    for row in reply:
        if not isinstance(row, (list, tuple)) or len(row) != 4:
            raise StreamReplyError(f"XPENDING reply: a row should be [id, consumer, idle, deliveries], got {row!r:.80}")
        try:
            rows.append(Pending(_as_bytes(row[0], "id"), _as_bytes(row[1], "consumer"), int(row[2]), int(row[3])))
        except (TypeError, ValueError):
            raise StreamReplyError(f"XPENDING reply: idle and deliveries should be integers, got {row!r:.80}") from None
    return rows


def parse_xinfo_group(reply, group: bytes | str) -> dict[str, int | None]:
    """``pending`` and ``lag`` of one group from an XINFO GROUPS reply (lag is None before Redis 7)."""
    want = _as_bytes(group, "group")
    if not isinstance(reply, (list, tuple)):
        raise StreamReplyError("XINFO GROUPS reply: expected an array")
    for row in reply:
        if isinstance(row, dict):
            info = {_as_bytes(k, "key").decode(): v for k, v in row.items()}
        elif isinstance(row, (list, tuple)) and len(row) % 2 == 0:
            info = {_as_bytes(row[i], "key").decode(): row[i + 1] for i in range(0, len(row), 2)}
        else:
            raise StreamReplyError("XINFO GROUPS reply: a group should be a flat map")
        if _as_bytes(info.get("name", b""), "name") == want:
            lag = info.get("lag")
            return {"pending": int(info.get("pending") or 0), "lag": None if lag is None else int(lag)}
    return {"pending": 0, "lag": None}


def stream_id_order(stream_id: bytes | str) -> tuple[int, int]:
    """``(ms, seq)`` of an entry id, for ordering: ids compare as numbers, not as strings ("9-0" < "10-0").

    Examples
    --------
    >>> sorted(["10-0", "9-1", "9-0"], key=stream_id_order)
    ['9-0', '9-1', '10-0']
    """
    raw = stream_id.decode() if isinstance(stream_id, bytes) else stream_id
    ms, _, seq = raw.partition("-")
    try:
        return int(ms), int(seq or 0)
    except ValueError:
        raise StreamReplyError(f"stream id {raw!r} is not of the form <ms>-<seq>") from None


def stream_id_ms(stream_id: bytes | str) -> int:
    """Milliseconds part of an entry id: the server's clock when the entry was added."""
    return stream_id_order(stream_id)[0]
