"""The live overview's figures, read from Redis and returned as plain JSON-ready data.

Reads what the workers, detectors and retrains already share: the per-minute
counts (:func:`ops.watchview.collect`), waves, campaigns, consumer groups, the
dead-letter streams, the decisions stream, the model registry and its retrain
reports.  With K partitions the counts, the held and deciding totals, the
comment groups' lag and the dead letters by reason are sums over the
partitions.  :func:`summarize_rates`, :func:`deadletter_counts` and
:func:`gate_summary` are pure, so they are tested without a server.  Nothing
returned holds an author; comment text appears only as a campaign's or a
family's example, which the page renders escaped.
"""
from __future__ import annotations

import heapq
import itertools
import json
from collections import Counter
from collections.abc import Sequence

from redis.exceptions import ResponseError

from model.actions import THRESHOLD_ACTIONS
from ops.registry import Registry
from ops.retrain import last_reports
from ops.watchview import SiteRow, collect
from worker.decisions import pending_count
from worker.holdqueue import held_count
from worker.streams import stream_id_order

HOURS = 3  # the per-minute counts live worker.rates_ttl_s (3 h by default)
BUCKET_MIN = 5
SITES_CHARTED = 8
DEADLETTER_SAMPLE = 2000
DECISIONS_SAMPLE = 5000
MODELS_SHOWN = 8
REPORTS_READ = 50
EXAMPLE_CHARS = 280


def _s(value) -> str:
    return value.decode("utf-8", "replace") if isinstance(value, bytes) else str(value)


def summarize_rates(rows: Sequence[SiteRow], *, now: float, bucket_min: int = BUCKET_MIN,
                    sites: int = SITES_CHARTED) -> dict:
    """Flagged share per site per bucket of ``bucket_min`` minutes, the busiest ``sites`` sites (pure).

    A bucket with no comments has ``None`` (a gap in the line, not a zero).
    """
    if not rows:
        return {"bucket_s": bucket_min * 60, "starts": [], "series": []}
    minutes = len(rows[0].totals)
    first_minute = int(now // 60) - minutes + 1
    # buckets aligned to the clock, the last one holding the current minute
    bucket_of = [(first_minute + i) // bucket_min for i in range(minutes)]
    buckets = sorted(set(bucket_of))
    index = {b: j for j, b in enumerate(buckets)}
    series = []
    for row in list(rows)[:sites]:
        totals = [0] * len(buckets)
        flagged = [0] * len(buckets)
        for i, (t, f) in enumerate(zip(row.totals, row.flagged)):
            totals[index[bucket_of[i]]] += t
            flagged[index[bucket_of[i]]] += f
        series.append({"site": row.site, "total": sum(totals), "flagged": sum(flagged),
                       "rates": [round(f / t, 4) if t else None for f, t in zip(flagged, totals)],
                       "counts": totals})
    return {"bucket_s": bucket_min * 60, "starts": [b * bucket_min * 60 for b in buckets], "series": series}


def deadletter_counts(entries) -> dict:
    """Dead letters by reason in a sample of the newest entries (pure)."""
    reasons = Counter()
    oldest = None
    for sid, fields in entries:
        f = {_s(k): _s(v) for k, v in fields.items()}
        reasons[f.get("reason", "") or "(none)"] += 1
        oldest = _s(sid)
    since = int(oldest.partition("-")[0]) / 1000.0 if oldest else None
    return {"sampled": sum(reasons.values()), "since": since,
            "reasons": [{"reason": r, "count": n} for r, n in reasons.most_common()]}


def gate_summary(report: dict | None) -> dict | None:
    """What a retrain report says about its gate, in a shape the page can show (pure).

    Each evaluated set gives the active model's figures and the candidate's:
    the one under ``candidate``, or the candidate the retrain chose (``chosen``,
    e.g. ``warm_start`` or ``scratch``) when it built several.
    """
    if not report:
        return None
    chosen = report.get("chosen")
    sets = []
    for name, pair in sorted((report.get("gate") or {}).get("sets", {}).items()):
        if not isinstance(pair, dict):
            continue
        row = {"set": name}
        for side, key in (("active", "active"), ("candidate", "candidate" if "candidate" in pair else chosen)):
            figures = pair.get(key) if key else None
            figures = figures if isinstance(figures, dict) else {}
            row[side] = {k: figures.get(k) for k in ("roc_auc", "recall_at_gate_fpr", "n", "spam")
                         if isinstance(figures.get(k), (int, float)) and not isinstance(figures.get(k), bool)}
        sets.append(row)
    return {"decision": str(report.get("decision", "")), "reasons": [str(r) for r in report.get("reasons", [])][:8],
            "finished_at": report.get("finished_at"), "labels_new": (report.get("labels") or {}).get("new"),
            "chosen": str(chosen or ""), "sets": sets}


def _groups(client, stream: str) -> list[dict]:
    try:
        groups = client.xinfo_groups(stream)
    except ResponseError as exc:
        if "no such key" in str(exc).lower():
            return []
        raise
    out = []
    for g in groups:
        lag = g.get("lag")
        out.append({"stream": stream, "group": _s(g.get("name", b"")), "lag": int(lag) if lag is not None else None,
                    "pending": int(g.get("pending", 0)), "consumers": int(g.get("consumers", 0))})
    return out


def _comment_groups(client, keys) -> list[dict]:
    """The comment streams' consumer groups; with K partitions one row per group, lag and pending summed."""
    parts = keys.parts
    if len(parts) == 1:
        return _groups(client, parts[0].comments)
    merged: dict[str, dict] = {}
    for part in parts:
        for g in _groups(client, part.comments):
            row = merged.setdefault(g["group"], {"stream": f"{keys.prefix}comments ({len(parts)} partitions)",
                                                 "group": g["group"], "lag": 0, "pending": 0, "consumers": 0})
            row["lag"] = None if row["lag"] is None or g["lag"] is None else row["lag"] + g["lag"]
            row["pending"] += g["pending"]
            row["consumers"] = max(row["consumers"], g["consumers"])
    return list(merged.values())


def newest_deadletters(client, keys, count: int = DEADLETTER_SAMPLE) -> list:
    """The newest ``count`` entries over every dead-letter stream (each partition's and the feedback's), newest first."""
    pipe = client.pipeline(transaction=False)
    streams = keys.deadletter_streams
    for stream in streams:
        pipe.xrevrange(stream, count=count)
    replies = pipe.execute()
    if len(replies) == 1:
        return replies[0]
    merged = heapq.merge(*replies, key=lambda entry: stream_id_order(entry[0]), reverse=True)
    return list(itertools.islice(merged, count))


def _examples(client, keys, ids: Sequence[str]) -> dict[str, str]:
    if not ids:
        return {}
    pipe = client.pipeline(transaction=False)
    for comment_id in ids:
        pipe.hget(keys.text(comment_id), "text")
    return {i: _s(t)[:EXAMPLE_CHARS] for i, t in zip(ids, pipe.execute()) if t is not None}


def decisions_since(client, keys, since: float) -> dict:
    """Decisions written since ``since`` (by their ``decided_at``), by decision, from the newest entries."""
    counts = Counter()
    for _sid, fields in client.xrevrange(keys.decisions, count=DECISIONS_SAMPLE):
        f = {_s(k): _s(v) for k, v in fields.items()}
        try:
            if float(f.get("decided_at", "0")) < since:
                break
        except ValueError:
            continue
        counts[f.get("decision", "")] += 1
    return dict(counts)


def models(client, keys) -> dict:
    registry = Registry(client=client, keys=keys)
    reports = {}
    recent = last_reports(client, keys, REPORTS_READ)
    for report in recent:
        version = report.get("candidate")
        if version and version not in reports:
            reports[version] = report
    rows = []
    for meta in registry.versions()[:MODELS_SHOWN]:
        version = meta.get("version", "")
        rows.append({
            "version": version, "active": meta.get("active") == "1", "source": meta.get("source", ""),
            "parent": meta.get("parent", ""), "size": int(meta.get("size", 0) or 0),
            "created_at": _float(meta.get("created_at")), "pushed_at": _float(meta.get("pushed_at")),
            "promoted_at": _float(meta.get("promoted_at")),
            **{a.value: _float(meta.get(a)) for a in THRESHOLD_ACTIONS},
            "gate": gate_summary(reports.get(version)),
        })
    history = registry.history()
    return {"active": registry.active(), "can_roll_back": len(history) >= 2 and history[0] == registry.active(),
            "previous": history[1] if len(history) >= 2 else None, "versions": rows,
            "last_retrain": gate_summary(recent[0]) if recent else None}


def _float(value) -> float | None:
    try:
        return float(value)
    except (TypeError, ValueError):
        return None


def collect_overview(client, keys, *, now: float, families: list[dict] | None = None) -> dict:
    """Every figure of the overview page at ``now``; Redis errors propagate."""
    snap = collect(client, keys, now=now, minutes=HOURS * 60)
    campaigns = []
    for cid, c in sorted(snap.campaigns.items(), key=lambda kv: -int(kv[1].get("members", 0) or 0)):
        campaigns.append({"id": cid, "site": str(c.get("site", "")), "members": int(c.get("members", 0) or 0),
                          "authors": c.get("authors"), "started": c.get("started"), "last_seen": c.get("last_seen"),
                          "example_id": str(c.get("example_id", ""))})
    examples = _examples(client, keys, [c["example_id"] for c in campaigns if c["example_id"]])
    for c in campaigns:
        c["example"] = examples.get(c["example_id"])
    waves = [{"site": site, "since": (w.get("minute") or 0) * 60 or None, "rate": w.get("rate"),
              "baseline": w.get("baseline")} for site, w in sorted(snap.waves.items())]
    dead = deadletter_counts(newest_deadletters(client, keys))
    return {
        "now": now,
        "held": held_count(client, keys),
        "deciding": pending_count(client, keys),
        "decisions_last_hour": decisions_since(client, keys, now - 3600),
        "rates": summarize_rates(snap.sites, now=now),
        "waves": waves,
        "campaigns": campaigns,
        "families": families or [],
        "deadletters": dead,
        "groups": (_comment_groups(client, keys) + _groups(client, keys.feedback)
                   + _groups(client, keys.decisions)),
        "models": models(client, keys),
        "events": [{"type": e.type, "ts": e.ts, "summary": _event_summary(e.type, e.data)} for e in snap.events],
    }


def _event_summary(kind: str, data: dict) -> str:
    if kind.startswith("wave"):
        return f"{data.get('site', '')}: flagged {float(data.get('rate', data.get('peak_rate', 0)) or 0):.0%}"
    if kind.startswith("campaign"):
        return f"{data.get('id', '')} on {data.get('site', '')}, {data.get('members', 0)} members"
    if kind in ("promote", "rollback"):
        return f"{data.get('version', '')} (was {data.get('previous') or 'none'}) by {data.get('actor') or '?'}"
    if kind == "retrain":
        return str(data.get("decision", ""))
    return json.dumps(data, sort_keys=True)[:80]
