"""Entries of the ``events`` stream: ``type``, ``ts`` (epoch seconds), ``data`` (a JSON object).

Writers (the wave detector, campaign detection, retrains, the model registry)
and readers (``seawall watch``, the metrics refresh, the demo) share these
helpers, so that the entry format lives in one place.  Event data never carries comment text or an
author: only sites, counts, rates, ids of Seawall's own objects and times.
"""
from __future__ import annotations

import json
from dataclasses import dataclass

EVENTS_MAXLEN = 100_000


@dataclass(frozen=True, slots=True)
class Event:
    stream_id: str
    type: str
    ts: float
    data: dict


def add_event(client, stream: str, type: str, data: dict, *, ts: float, maxlen: int = EVENTS_MAXLEN, pipeline=None):
    """XADD one event (approximately capped at ``maxlen``); queued on ``pipeline`` when given."""
    if not isinstance(type, str) or not type:
        raise ValueError(f"add_event: type must be a non-empty string, got {type!r}")
    if not isinstance(data, dict):
        raise ValueError(f"add_event: data must be a dict, got {data.__class__.__name__}")
    fields = {"type": type, "ts": f"{float(ts):.3f}", "data": json.dumps(data, separators=(",", ":"), sort_keys=True)}
    pipe = pipeline if pipeline is not None else client.pipeline(transaction=False)
    pipe.xadd(stream, fields, maxlen=maxlen, approximate=True)
    if pipeline is None:
        return pipe.execute()[0]
    return None


def read_events(client, stream: str, *, newest_first: bool = False, count: int | None = None) -> list[Event]:
    """The events of ``stream`` (oldest first, or the ``count`` newest first); entries that are not events are skipped."""
    raw = client.xrevrange(stream, count=count) if newest_first else client.xrange(stream, count=count)
    return [e for e in (parse_event(sid, fields) for sid, fields in raw) if e is not None]


def parse_event(stream_id, fields: dict) -> Event | None:
    """An :class:`Event` from a raw entry (bytes or str), or ``None`` if it is not one."""
    def text(value) -> str:
        return value.decode("utf-8", "replace") if isinstance(value, bytes) else str(value)

    decoded = {text(k): text(v) for k, v in (fields or {}).items()}
    type_ = decoded.get("type", "")
    if not type_:
        return None
    try:
        ts = float(decoded.get("ts", "0"))
    except ValueError:
        ts = 0.0
    try:
        data = json.loads(decoded.get("data", "{}"))
    except ValueError:
        data = {}
    return Event(stream_id=text(stream_id), type=type_, ts=ts, data=data if isinstance(data, dict) else {})
