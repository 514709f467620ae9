"""The frame ``seawall watch`` draws: what is going on, from Redis alone.

:func:`collect` reads one :class:`Snapshot` from Redis (the per-minute counts
the workers share, waves, campaigns, the consumer group, the model registry
and the events stream); :func:`render` turns a snapshot into text with no I/O,
so a frame can be tested as a string.  Names that come from producers (site
names) are cut and stripped of control characters before they reach the
terminal.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field

from redis.exceptions import ResponseError

from ops.times import age, clock
from ops.waves import read_active
from worker.campaigns import read_campaigns
from worker.events import Event, parse_event
from worker.rates import rate_counts, read_minutes
from worker.settings import Keys

SPARK = "▁▂▃▄▅▆▇█"
HISTORY_MINUTES = 15
SHARE_MINUTES = 5
EVENT_LOOKBACK = 500
EVENTS_SHOWN = 5
SITES_SHOWN = 12


@dataclass
class SiteRow:
    site: str
    totals: list[int]  # oldest first, one per minute, the current (incomplete) minute last
    flagged: list[int]


@dataclass
class Snapshot:
    now: float
    sites: list[SiteRow] = field(default_factory=list)
    waves: dict[str, dict] = field(default_factory=dict)
    campaigns: dict[str, dict] = field(default_factory=dict)
    lag: int | None = None
    pending: int | None = None
    consumers: int | None = None
    model_version: str | None = None
    model_created: float | None = None
    model_promoted: float | None = None
    retrain: Event | None = None
    events: list[Event] = field(default_factory=list)


def collect(client, keys: Keys, *, now: float | None = None, minutes: int = HISTORY_MINUTES) -> Snapshot:
    """Read one snapshot; Redis errors propagate to the caller."""
    now = time.time() if now is None else now
    current = int(now // 60)
    span = list(range(current - minutes + 1, current + 1))
    hashes = read_minutes(client, keys, span)  # every partition's counts, summed per minute
    pipe = client.pipeline(transaction=False)
    pipe.get(keys.models_active)
    pipe.xrevrange(keys.events, count=EVENT_LOOKBACK)
    active, raw_events = pipe.execute()

    snap = Snapshot(now=now)
    snap.sites = _site_rows(hashes)
    snap.waves = read_active(client, keys)
    snap.campaigns = read_campaigns(client, keys)
    snap.lag, snap.pending, snap.consumers = _group(client, keys)
    if active:
        snap.model_version = _text(active)
        created, promoted = client.hmget(keys.model_meta(snap.model_version), ["created_at", "promoted_at"])
        snap.model_created, snap.model_promoted = _seconds(created), _seconds(promoted)
    events = [e for e in (parse_event(i, f) for i, f in raw_events) if e is not None]
    snap.retrain = next((e for e in events if e.type == "retrain"), None)
    snap.events = events[:EVENTS_SHOWN]
    return snap


def _site_rows(hashes) -> list[SiteRow]:
    per_site: dict[str, SiteRow] = {}
    n = len(hashes)
    for idx, raw in enumerate(hashes):
        for site, (total, flagged) in rate_counts(raw).items():
            row = per_site.setdefault(site, SiteRow(site=site, totals=[0] * n, flagged=[0] * n))
            row.totals[idx] += total
            row.flagged[idx] += flagged
    return sorted(per_site.values(), key=lambda r: (-sum(r.totals), r.site))


def _group(client, keys: Keys) -> tuple[int | None, int | None, int | None]:
    """The workers' group over every partition's stream: lag and pending summed, consumers at most.

    A partition with no stream or group yet adds nothing; None when no partition has one.  A lag Redis
    cannot compute (None) makes the sum unknown.
    """
    found = []
    for part in keys.parts:
        try:
            groups = client.xinfo_groups(part.comments)
        except ResponseError as exc:  # no stream yet is a normal state ("ERR no such key"); anything else propagates
            if "no such key" in str(exc).lower():
                continue
            raise
        for g in groups:
            if _text(g.get("name", b"")) == keys.group:
                lag = g.get("lag")
                found.append((int(lag) if lag is not None else None, int(g.get("pending", 0)),
                              int(g.get("consumers", 0))))
    if not found:
        return None, None, None
    lags = [lag for lag, _, _ in found]
    return (None if None in lags else sum(lags)), sum(p for _, p, _ in found), max(c for _, _, c in found)


# -- rendering (pure) -------------------------------------------------------------

def sparkline(values: list[int]) -> str:
    """One block character per value, scaled to the largest."""
    top = max(values, default=0)
    if top <= 0:
        return SPARK[0] * len(values)
    return "".join(SPARK[min(len(SPARK) - 1, int(v * (len(SPARK) - 1) / top + 0.5))] if v else " " for v in values)


def clean(name: str, width: int) -> str:
    """A producer-supplied name made safe for the terminal and cut to ``width``."""
    safe = "".join(ch if ch.isprintable() else "?" for ch in name) or "(none)"
    return safe if len(safe) <= width else safe[: width - 1] + "…"


def render(snap: Snapshot, *, title: str = "") -> str:
    """The whole frame as text (no trailing escape codes)."""
    lines = [f"Seawall watch  {time.strftime('%Y-%m-%d %H:%M:%S', time.gmtime(snap.now))} UTC"
             + (f"  {title}" if title else "")]
    if snap.model_version:
        model_age = age(snap.now - snap.model_created) if snap.model_created else "unknown age"
        promoted = f", promoted {age(snap.now - snap.model_promoted)} ago" if snap.model_promoted else ""
        lines.append(f"model     {clean(snap.model_version, 20)}  age {model_age} (trained or retrained){promoted}")
    else:
        lines.append("model     none (no active model in the registry)")
    lines.append("retrain   " + _retrain_line(snap))
    if snap.lag is None and snap.pending is None:
        lines.append("lag       none (no consumer group yet)")
    else:
        lag = "?" if snap.lag is None else f"{snap.lag:,}"
        lines.append(f"lag       {lag} waiting, {snap.pending:,} pending, {snap.consumers} consumers")
    lines.append("")
    lines.append(f"{'SITE':<26}{'/MIN':>7}  {'FLAGGED ' + str(SHARE_MINUTES) + 'm':>11}  LAST {len(snap.sites[0].totals) if snap.sites else HISTORY_MINUTES} MIN")
    if not snap.sites:
        lines.append("  (no comments counted in the last minutes)")
    for row in snap.sites[:SITES_SHOWN]:
        last_full = row.totals[-2] if len(row.totals) > 1 else row.totals[-1]
        total = sum(row.totals[-SHARE_MINUTES - 1:])
        share = sum(row.flagged[-SHARE_MINUTES - 1:]) / total if total else 0.0
        wave = "  WAVE" if row.site in snap.waves else ""
        lines.append(f"{clean(row.site, 25):<26}{last_full:>7}  {share:>10.1%}  {sparkline(row.totals)}{wave}")
    if len(snap.sites) > SITES_SHOWN:
        lines.append(f"  … and {len(snap.sites) - SITES_SHOWN} more sites")
    lines.append("")
    if snap.waves:
        for site, w in sorted(snap.waves.items()):
            since = clock((w.get("minute", 0)) * 60) if w.get("minute") else "?"
            lines.append(f"WAVE      {clean(site, 25)} since {since}: flagged {w.get('rate', 0):.1%} "
                         f"vs normal {w.get('baseline', 0):.1%}")
    else:
        lines.append("waves     none")
    if snap.campaigns:
        for cid, c in sorted(snap.campaigns.items(), key=lambda kv: -kv[1].get("members", 0)):
            since = clock(c["started"]) if c.get("started") else "?"
            lines.append(f"CAMPAIGN  {clean(cid, 16)} on {clean(c.get('site', '') or '?', 20)}: "
                         f"{c.get('members', 0)} members, {c.get('authors', '?')}+ authors at start, since {since}")
    else:
        lines.append("campaigns none")
    if snap.events:
        lines.append("")
        lines.append("recent events")
        for e in snap.events:
            lines.append(f"  {clock(e.ts)}  {age(snap.now - e.ts) + ' ago':>9}  {clean(e.type, 16):<15} "
                         f"{clean(event_line(e), 72)}")
    return "\n".join(lines) + "\n"


def _retrain_line(snap: Snapshot) -> str:
    e = snap.retrain
    if e is None:
        return "none yet"
    decision = e.data.get("decision", "?")
    reasons = e.data.get("reasons") or []
    why = f" ({clean('; '.join(map(str, reasons)), 60)})" if reasons and decision != "promoted" else ""
    return f"{clean(str(decision), 12)} {age(snap.now - e.ts)} ago{why}"


def _share(value) -> str:
    return f"{value:.1%}" if isinstance(value, (int, float)) else "?"


def event_line(e: Event) -> str:
    """One event in words (pure); an event type this version does not know shows its fields as ``key=value``."""
    d = e.data
    if e.type == "wave_start":
        return f"wave on {d.get('site', '?')}: flagged {_share(d.get('rate'))} vs normal {_share(d.get('baseline'))}"
    if e.type == "wave_end":
        return (f"wave over on {d.get('site', '?')} after {d.get('minutes', '?')} min, "
                f"peak {_share(d.get('peak_rate'))} flagged")
    if e.type == "campaign_start":
        return (f"campaign {d.get('id', '?')} on {d.get('site') or '?'}: {d.get('members', 0)} near-duplicates "
                f"from {d.get('authors', '?')} or more authors")
    if e.type == "campaign_end":
        return f"campaign {d.get('id', '?')} on {d.get('site') or '?'} over: {d.get('members', 0)} members"
    if e.type in ("promote", "rollback"):
        verb = "promoted" if e.type == "promote" else "rolled back to"
        by = f" by {d['actor']}" if d.get("actor") else ""
        return f"{verb} {d.get('version', '?')} (was {d.get('previous') or 'none'}){by}"
    if e.type == "retrain":
        decision = d.get("decision", "?")
        if decision == "promoted":
            return f"promoted {d.get('candidate', '?')} after {d.get('labels_new', 0)} new labels"
        if decision == "refused":
            return f"kept {d.get('active', '?')}; candidate refused by the gate"
        if decision == "failed":
            return f"failed: {d.get('error', '?')}"
        return f"{decision}: {d.get('labels_new', 0)} new labels"
    return ", ".join(f"{k}={v}" for k, v in sorted(d.items()) if not isinstance(v, (dict, list)))


def _text(value) -> str:
    return value.decode("utf-8", "replace") if isinstance(value, bytes) else str(value)


def _seconds(value) -> float | None:
    try:
        return float(value) if value is not None else None
    except ValueError:
        return None
