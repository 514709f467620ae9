"""Flagged-rate wave detection over the per-minute counts all workers share.

Every worker adds its verdicts to ``rates:{minute}`` (fields ``{site}:total``,
``{site}:hold``, ``{site}:reject``) in the comment's own MULTI, so the counts
in Redis are the whole deployment's.  :class:`WaveDetector` turns each
*completed* minute into one observation per site and runs the upper CUSUM of
:mod:`ops.cusum` on it.

Any number of processes may call :meth:`WaveDetector.tick`: a short lock
lets one of them at a time advance the shared cursor, and the per-site state
lives in Redis, so a detector survives restarts and moves between processes
without losing its baseline.  A wave's start and end are events on the
``events`` stream (``wave_start``, ``wave_end``) and the hash ``waves:active``
lists the sites in a wave (read by the ``seawall_wave_active`` gauge and
``seawall watch``).
"""
from __future__ import annotations

import json
import logging
import os
import time
from collections.abc import Callable, Mapping
from typing import TYPE_CHECKING

from ops.cusum import WaveParams, WaveState, observe_minute
from worker.events import EVENTS_MAXLEN, add_event
from worker.rates import rate_counts, read_minutes
from worker.settings import Keys

if TYPE_CHECKING:  # ops.metrics imports prometheus-client, which `seawall watch` (a reader of this module) never needs
    from ops.metrics import SiteLabels

log = logging.getLogger("seawall.waves")

# A minute is read this long after it ended, so that batches scored in its
# last second have committed their counts.
GRACE_S = 2.0
# Never replay more history than the counters keep (rates TTL: 3 hours).
MAX_CATCH_UP_MINUTES = 180
LOCK_TTL_S = 30

_RELEASE = """
if redis.call('get', KEYS[1]) == ARGV[1] then return redis.call('del', KEYS[1]) end
return 0
"""


def wave_keys(keys: Keys) -> dict[str, str]:
    return {
        "state": keys.shared("waves", "state"),
        "active": keys.shared("waves", "active"),
        "cursor": keys.shared("waves", "cursor"),
        "lock": keys.shared("waves", "lock"),
    }


def parse_rates(raw: Mapping, site_label: SiteLabels) -> dict[str, tuple[int, int]]:
    """``{site_label: (total, flagged)}`` from one ``rates:{minute}`` hash (:func:`worker.rates.rate_counts`).

    Unlisted sites add up under ``other``.
    """
    out: dict[str, list[int]] = {}
    for site, (total, flagged) in rate_counts(raw).items():
        counts = out.setdefault(site_label(site), [0, 0])
        counts[0] += total
        counts[1] += flagged
    return {site: (t, f) for site, (t, f) in out.items()}


def last_complete_minute(now: float) -> int:
    return int((now - GRACE_S) // 60) - 1


class WaveDetector:
    """Advance the shared wave state to the last completed minute.

    Parameters
    ----------
    client : redis client.
    keys : key names (the deployment's prefix).
    params : :class:`ops.cusum.WaveParams`.
    sites : the site allow-list; other sites are watched together as ``other``.
    clock : wall clock, injectable for tests and simulations.
    """

    def __init__(self, *, client, keys: Keys, params: WaveParams, sites=(), clock: Callable[[], float] = time.time,
                 events_maxlen: int = EVENTS_MAXLEN):
        if not isinstance(params, WaveParams):
            raise ValueError(f"WaveDetector: params must be WaveParams, got {type(params).__name__}")
        self.client = client
        self.keys = keys
        self.params = params
        from ops.metrics import SiteLabels

        self.site_label = SiteLabels(sites=sites)
        self.clock = clock
        self.events_maxlen = events_maxlen
        self._k = wave_keys(keys)

    def tick(self) -> list[dict]:
        """Process every completed minute not yet processed; return the events raised.

        Returns an empty list when another process holds the lock.
        """
        token = f"{os.getpid()}:{time.monotonic_ns()}"
        if not self.client.set(self._k["lock"], token, nx=True, ex=LOCK_TTL_S):
            return []
        try:
            return self._advance()
        finally:
            self.client.eval(_RELEASE, 1, self._k["lock"], token)

    def active(self) -> dict[str, dict]:
        """Sites in a wave now, with their start minute and rates."""
        return read_active(self.client, self.keys)

    def _advance(self) -> list[dict]:
        now = self.clock()
        last = last_complete_minute(now)
        raw_cursor = self.client.get(self._k["cursor"])
        if raw_cursor is None:
            cursor = last - self.params.baseline_minutes - 1
        else:
            cursor = int(raw_cursor)
        cursor = max(cursor, last - MAX_CATCH_UP_MINUTES)
        minutes = list(range(cursor + 1, last + 1))
        if not minutes:
            return []
        hashes = read_minutes(self.client, self.keys, minutes)  # every partition's counts, summed per minute
        raw_states = self.client.hgetall(self._k["state"])
        states = {_text(k): WaveState.from_dict(json.loads(v)) for k, v in raw_states.items()}

        events: list[dict] = []
        for minute, raw in zip(minutes, hashes):
            counts = parse_rates(raw, self.site_label)
            for site in sorted(set(states) | set(counts)):
                total, flagged = counts.get(site, (0, 0))
                before = states.get(site, WaveState())
                after, change = observe_minute(before, flagged=flagged, total=total, minute=minute, params=self.params)
                states[site] = after
                if change == "start":
                    events.append(_start_event(site, minute, after, total, flagged))
                elif change == "end":
                    events.append(_end_event(site, minute, before, after))

        write = self.client.pipeline(transaction=True)
        if states:
            write.hset(self._k["state"], mapping={s: json.dumps(st.to_dict()) for s, st in states.items()})
        for event in events:
            site = event["data"]["site"]
            if event["type"] == "wave_start":
                write.hset(self._k["active"], site, json.dumps(event["data"]))
            else:
                write.hdel(self._k["active"], site)
            add_event(self.client, self.keys.events, event["type"], event["data"], ts=now,
                      maxlen=self.events_maxlen, pipeline=write)
        write.set(self._k["cursor"], last)
        write.execute()
        for event in events:
            log.warning("%s on site %s (minute %d)", event["type"], event["data"]["site"], event["data"]["minute"])
        return events


def read_active(client, keys: Keys) -> dict[str, dict]:
    raw = client.hgetall(wave_keys(keys)["active"])
    out = {}
    for k, v in raw.items():
        try:
            out[_text(k)] = json.loads(v)
        except ValueError:
            out[_text(k)] = {}
    return out


def _start_event(site: str, minute: int, state: WaveState, total: int, flagged: int) -> dict:
    return {"type": "wave_start", "data": {
        "site": site, "minute": minute, "rate": round(flagged / total, 4), "baseline": round(state.p0 or 0.0, 4),
        "comments": total, "z": round(state.last_z, 2), "cusum": round(state.c, 2),
    }}


def _end_event(site: str, minute: int, before: WaveState, after: WaveState) -> dict:
    start = before.start if before.start is not None else minute
    return {"type": "wave_end", "data": {
        "site": site, "minute": minute, "start_minute": start, "minutes": minute - start + 1,
        "peak_rate": round(after.peak, 4), "baseline": round(after.p0 or 0.0, 4),
    }}


def _text(value) -> str:
    return value.decode("utf-8", "replace") if isinstance(value, bytes) else str(value)
