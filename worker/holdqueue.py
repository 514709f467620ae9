"""Reading the hold queue: held comment ids joined to their cached text and verdict.

The worker puts every held comment in the ``held`` sorted set (member = the
comment id, score = epoch seconds when it was held) and caches its text and
verdict in the ``text:{id}`` hash (see :mod:`worker.commit`).  A moderator
tool reads both through :func:`read_held`; decisions go through
:mod:`worker.decisions`, never through writes of its own.

With K partitions (``keys.partitions``) each partition has its own ``held``
set; the readers here merge them, so a moderator sees one queue: counts sum,
and a page of the queue is the same page a single set of all held comments
would give (ordered by hold time, ties by id).

Parsing the cached hash is a pure function (:func:`parse_held`), so bad or
missing values (an expired cache, a hash from an older worker without
``reasons``, a score that is not a number) are handled without a server: the
comment is still listed, with what is known.
"""
from __future__ import annotations

import heapq
import json
import math
from collections.abc import Sequence
from dataclasses import dataclass

from worker.settings import Keys

# Fields read from text:{id}.  ``rule`` and ``campaign`` are written by workers
# that name the rule that decided; older caches lack them (None below).
CACHED_FIELDS = ("text", "site", "author", "ts", "score", "action", "model", "reasons", "rule", "campaign",
                 "stream_id")
MAX_READ = 100_000


@dataclass(frozen=True, slots=True)
class HeldComment:
    """One held comment as a moderator sees it.

    ``text`` is None when the cache entry has expired; ``score`` is None when
    it is missing or not a number; ``reasons`` are ``(token, contribution)``
    pairs, positive toward spam.
    """

    id: str
    held_at: float
    text: str | None
    site: str = ""
    author: str = ""
    ts: float | None = None
    score: float | None = None
    action: str = ""
    model: str = ""
    reasons: tuple[tuple[str, float], ...] = ()
    rule: str | None = None
    campaign: str | None = None
    stream_id: str = ""


def _s(value) -> str | None:
    if value is None:
        return None
    return value.decode("utf-8", "replace") if isinstance(value, bytes) else str(value)


def _number(value) -> float | None:
    try:
        x = float(value)
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) else None


def parse_reasons(raw: str | None) -> tuple[tuple[str, float], ...]:
    """The verdict's ``reasons`` JSON (``[[token, contribution], ...]``) as pairs; junk gives ``()`` (pure)."""
    if not raw:
        return ()
    try:
        items = json.loads(raw)
    except ValueError:
        return ()
    if not isinstance(items, list):
        return ()
    out = []
    for item in items:
        if isinstance(item, list) and len(item) == 2 and isinstance(item[0], str):
            value = _number(item[1])
            if value is not None:
                out.append((item[0], value))
    return tuple(out)


def parse_held(comment_id, held_at, values: Sequence) -> HeldComment:
    """A :class:`HeldComment` from the id, its ``held`` score and the HMGET of :data:`CACHED_FIELDS` (pure)."""
    v = dict(zip(CACHED_FIELDS, (_s(x) for x in values)))
    return HeldComment(
        id=_s(comment_id) or "",
        held_at=_number(held_at) or 0.0,
        text=v["text"],
        site=v["site"] or "",
        author=v["author"] or "",
        ts=_number(v["ts"]),
        score=_number(v["score"]),
        action=v["action"] or "",
        model=v["model"] or "",
        reasons=parse_reasons(v["reasons"]),
        rule=v["rule"] or None,
        campaign=v["campaign"] or None,
        stream_id=v["stream_id"] or "",
    )


def held_count(client, keys: Keys) -> int:
    """Held comments over every partition."""
    pipe = client.pipeline(transaction=False)
    for part in keys.parts:
        pipe.zcard(part.held)
    return sum(int(n) for n in pipe.execute())


def newest_held_at(client, keys: Keys) -> float | None:
    """When the most recent comment was held, or None for an empty queue."""
    pipe = client.pipeline(transaction=False)
    for part in keys.parts:
        pipe.zrevrange(part.held, 0, 0, withscores=True)
    tops = [float(top[0][1]) for top in pipe.execute() if top]
    return max(tops) if tops else None


def merge_pages(pages: Sequence[Sequence[tuple]], *, offset: int, limit: int, newest_first: bool) -> list[tuple]:
    """One page ``[offset, offset + limit)`` of the union of per-partition ``(member, score)`` lists (pure).

    Each list is ordered as ZREVRANGE (``newest_first``) or ZRANGE gives it
    and holds at least its first ``offset + limit`` members; the result is the
    page one sorted set of every member would give: by score, ties by member.

    >>> merge_pages([[(b"c", 3.0), (b"a", 1.0)], [(b"b", 2.0)]], offset=1, limit=2, newest_first=True)
    [(b'b', 2.0), (b'a', 1.0)]
    """
    if newest_first:
        merged = heapq.merge(*pages, key=lambda row: (-float(row[1]), _Descending(row[0])))
    else:
        merged = heapq.merge(*pages, key=lambda row: (float(row[1]), _bytes(row[0])))
    out = []
    for i, row in enumerate(merged):
        if i >= offset + limit:
            break
        if i >= offset:
            out.append(row)
    return out


def _bytes(value) -> bytes:
    return value if isinstance(value, bytes) else str(value).encode("utf-8")


class _Descending:
    """Orders members descending, as ZREVRANGE orders equal scores."""

    __slots__ = ("b",)

    def __init__(self, value):
        self.b = _bytes(value)

    def __lt__(self, other):
        return self.b > other.b

    def __eq__(self, other):
        return self.b == other.b


def read_held(client, keys: Keys, *, limit: int = 500, offset: int = 0, newest_first: bool = True) -> list[HeldComment]:
    """Up to ``limit`` held comments from ``offset``, newest (or oldest) first, with their cached fields.

    Two round trips: one pipeline of ZRANGEs (one per partition), one pipeline of HMGETs.
    """
    for name, value, low in (("limit", limit, 1), ("offset", offset, 0)):
        if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= MAX_READ:
            raise ValueError(f"read_held: {name} must be an integer in [{low}, {MAX_READ}], got {value!r}")
    parts = keys.parts
    if len(parts) == 1:
        read = client.zrevrange if newest_first else client.zrange
        rows = read(parts[0].held, offset, offset + limit - 1, withscores=True)
    else:
        pipe = client.pipeline(transaction=False)
        for part in parts:
            (pipe.zrevrange if newest_first else pipe.zrange)(part.held, 0, offset + limit - 1, withscores=True)
        rows = merge_pages(pipe.execute(), offset=offset, limit=limit, newest_first=newest_first)
    if not rows:
        return []
    pipe = client.pipeline(transaction=False)
    for member, _score in rows:
        pipe.hmget(keys.text(_s(member)), CACHED_FIELDS)
    return [parse_held(member, score, values) for (member, score), values in zip(rows, pipe.execute())]


def read_held_by_id(client, keys: Keys, ids: Sequence[str]) -> list[HeldComment]:
    """The listed comments that are still held, in the order given (gone ones are left out)."""
    if not ids:
        return []
    pipe = client.pipeline(transaction=False)
    for comment_id in ids:
        pipe.zscore(keys.part_of(comment_id).held, comment_id)
        pipe.hmget(keys.text(comment_id), CACHED_FIELDS)
    replies = pipe.execute()
    out = []
    for i, comment_id in enumerate(ids):
        held_at, values = replies[2 * i], replies[2 * i + 1]
        if held_at is not None:
            out.append(parse_held(comment_id, held_at, values))
    return out
