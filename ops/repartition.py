"""Moving a deployment's per-comment state from one number of partitions to another.

When ``keys.partitions`` changes, every key named by a comment id moves to
another name (the hash tag of the comment's new partition): its cached text
and verdict (``text``), its "already judged" marker (``done``), and its place
in the hold queue (``held``), and a decision still inside its undo window
(``decisions:pending``).  :func:`move_partition_state` copies them to the
new names with their time to live (``DUMP``/``PTTL``/``RESTORE``, which work
between any two keys, on one Redis or across the shards of a cluster) and then
deletes the old ones; held comments keep the time they were held.  The keys
outside the partitions (registry, feedback, labels, events, decisions, ...)
change names when the shared hash tag comes or goes (K = 1 to K > 1); they
move too (:func:`ops.sharedstate.move_shared_state`).

The streams do not move: drain the old comment streams before switching (stop
the producers, let the workers finish), and let readers of the old verdict and
dead-letter streams finish them.  The per-minute counts expire on their own
(``worker.rates_ttl_s``).  See the README, "Changing the number of partitions".
"""
from __future__ import annotations

from dataclasses import dataclass, field

import redis

from worker.settings import Keys


@dataclass
class MoveReport:
    """What :func:`move_partition_state` found and moved."""

    held: int = 0
    text: int = 0
    done: int = 0
    kept: int = 0  # the new name already existed: the old key was left in place
    pending: int = 0  # decisions inside their undo window (worker.decisions.move_pending)
    shared: int = 0  # keys outside the partitions, renamed when the shared hash tag comes or goes (ops.sharedstate)
    undrained: dict = field(default_factory=dict)  # old stream -> (lag, pending), when not drained

    def as_dict(self) -> dict:
        return {"held": self.held, "text": self.text, "done": self.done, "kept": self.kept,
                "pending": self.pending, "shared": self.shared,
                "undrained": {k: list(v) for k, v in self.undrained.items()}}


def undrained_streams(client, old: Keys) -> dict[str, tuple[int, int]]:
    """Old comment streams whose group still has entries to deliver or to acknowledge: ``{stream: (lag, pending)}``."""
    out = {}
    for part in old.parts:
        try:
            groups = client.xinfo_groups(part.comments)
        except redis.ResponseError:  # no such stream: nothing was ever sent there
            continue
        for g in groups:
            name = g["name"].decode() if isinstance(g["name"], bytes) else g["name"]
            if name != old.group:
                continue
            lag, pending = int(g.get("lag") or 0), int(g.get("pending") or 0)  # lag: Redis 7 and later
            if lag > 0 or pending > 0:
                out[part.comments] = (lag, pending)
    return out


def _move_key(client, old_key: str, new_key: str, report: MoveReport, kind: str, *, dry_run: bool) -> None:
    from ops.sharedstate import move_key

    if old_key == new_key:
        return
    outcome = "moved" if dry_run else move_key(client, old_key, new_key)
    if outcome == "moved":
        setattr(report, kind, getattr(report, kind) + 1)
    elif outcome == "kept":
        report.kept += 1


def _ids_under(client, prefix: str):
    """Comment ids of the keys ``<prefix><id>`` (SCAN: on a cluster client, every primary is scanned)."""
    for key in client.scan_iter(match=_escape(prefix) + "*", count=1000):
        name = key.decode("utf-8", "surrogateescape") if isinstance(key, bytes) else key
        yield name[len(prefix):]


def _escape(pattern: str) -> str:
    out = []
    for ch in pattern:
        if ch in "*?[]\\":
            out.append("\\")
        out.append(ch)
    return "".join(out)


def move_partition_state(client, old: Keys, new: Keys, *, dry_run: bool = False, force: bool = False) -> MoveReport:
    """Move held comments, cached texts and done markers from ``old``'s partitions to ``new``'s.

    The layouts may differ in prefix too (a single-partition deployment on a
    cluster has a hash tag in its prefix, ``{seawall}:``, which K > 1 drops).

    Refuses (returns a report with ``undrained`` filled in, moving nothing)
    while an old comment stream still has entries to deliver or acknowledge,
    unless ``force``.  ``dry_run`` counts what would move.
    """
    report = MoveReport()
    report.undrained = undrained_streams(client, old)
    if report.undrained and not force:
        return report
    for part in old.parts:
        for kind in ("text", "done"):
            prefix = part.key(kind, "")
            for cid in list(_ids_under(client, prefix)):
                target = new.part_of(cid)
                _move_key(client, prefix + cid, target.key(kind, cid), report, kind, dry_run=dry_run)
        held = client.zrange(part.held, 0, -1, withscores=True)
        for member, score in held:
            cid = member.decode() if isinstance(member, bytes) else member
            target = new.part_of(cid).held
            if target == part.held:
                continue
            report.held += 1
            if not dry_run:
                client.zadd(target, {cid: score})
                client.zrem(part.held, cid)
    from ops.sharedstate import move_shared_state
    from worker.decisions import move_pending

    report.pending = move_pending(client, old, new, dry_run=dry_run)
    shared = move_shared_state(client, old, new, dry_run=dry_run)
    report.shared, report.kept = shared["moved"], report.kept + shared["kept"]
    return report
