"""The per-minute counts: ``rates:{minute}`` hashes and the one reader of their fields.

The commit adds each verdict to the hash of its minute: ``{site}:total`` for
every comment, ``{site}:{action}`` for a flagged one (held or rejected).  The
wave detector, ``seawall watch`` and the console read them through
:func:`rate_counts`.
"""
from __future__ import annotations

from collections.abc import Mapping

from model.actions import FLAGGED_ACTIONS

TOTAL = "total"


def rate_counts(raw: Mapping) -> dict[str, tuple[int, int]]:
    """``{site: (total, flagged)}`` from one ``rates:{minute}`` hash (bytes or str fields).

    The site itself may contain colons.  Unknown kinds and non-numbers are
    ignored, never raised on; flagged never exceeds total.

    Examples
    --------
    >>> rate_counts({b"a:b.example:total": b"5", b"a:b.example:hold": b"2", "x:mood": "1", "y:total": "n/a"})
    {'a:b.example': (5, 2)}
    """
    out: dict[str, list[int]] = {}
    for field, value in raw.items():
        field = field.decode("utf-8", "replace") if isinstance(field, bytes) else str(field)
        site, sep, kind = field.rpartition(":")
        if not sep or (kind != TOTAL and kind not in FLAGGED_ACTIONS):
            continue
        try:
            n = int(value)
        except (TypeError, ValueError):
            continue
        counts = out.setdefault(site, [0, 0])
        counts[0 if kind == TOTAL else 1] += n
    return {site: (t, min(f, t)) for site, (t, f) in out.items()}


def read_minutes(client, keys, minutes) -> list[dict]:
    """One raw counts mapping per minute, each the sum of that minute's hash in every partition.

    One pipelined round trip (K hashes per minute); the sums feed :func:`rate_counts` as one hash would.
    """
    parts = keys.parts
    pipe = client.pipeline(transaction=False)
    for minute in minutes:
        for part in parts:
            pipe.hgetall(part.rates(minute))
    replies = pipe.execute()
    k = len(parts)
    return [sum_hashes(replies[i * k:(i + 1) * k]) for i in range(len(minutes))]


def sum_hashes(hashes) -> dict:
    """Field-wise sums of several counts hashes (bytes or str fields); non-numbers are left out (pure).

    >>> sum_hashes([{b"a:total": b"2"}, {"a:total": "3", "a:hold": "1", "b:total": "x"}])
    {'a:total': 5, 'a:hold': 1}
    """
    if len(hashes) == 1:
        return hashes[0]
    out: dict[str, int] = {}
    for raw in hashes:
        for field, value in raw.items():
            field = field.decode("utf-8", "replace") if isinstance(field, bytes) else str(field)
            try:
                n = int(value)
            except (TypeError, ValueError):
                continue
            out[field] = out.get(field, 0) + n
    return out
