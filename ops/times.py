"""Moments and durations as people read them: UTC clock times and "5m ago".

Every time Seawall shows a person (``models list``, ``models show``, ``watch``,
``retrain``) goes through here, so none of them prints raw epoch seconds.
Pure functions; ``--json`` output keeps the epoch numbers for scripts.
"""
from __future__ import annotations

import time


def age(seconds: float) -> str:
    """A duration, coarser as it grows: ``45s``, ``12m``, ``3h 5m``, ``4d 2h``."""
    seconds = max(0, int(seconds))
    if seconds < 120:
        return f"{seconds}s"
    if seconds < 7200:
        return f"{seconds // 60}m"
    if seconds < 2 * 86400:
        return f"{seconds // 3600}h {seconds % 3600 // 60}m"
    return f"{seconds // 86400}d {seconds % 86400 // 3600}h"


def clock(ts: float) -> str:
    """``HH:MM`` in UTC."""
    return time.strftime("%H:%M", time.gmtime(ts))


def utc(ts: float) -> str:
    """``2026-12-04 16:52:07 UTC``."""
    return time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime(ts))


def moment(ts, now: float | None = None) -> str:
    """An epoch time (number or numeric string) as ``2026-12-04 16:52 UTC (5m ago)``; ``-`` when absent."""
    try:
        ts = float(ts)
    except (TypeError, ValueError):
        return "-"
    if ts <= 0:
        return "-"
    now = time.time() if now is None else now
    when = time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime(ts))
    return f"{when} ({age(now - ts)} ago)" if now >= ts else f"{when} (in {age(ts - now)})"
