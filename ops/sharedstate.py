"""The keys outside the partitions, and moving them when a deployment changes its layout.

With ``keys.partitions`` = 1 the shared keys (the registry, feedback, labels,
events, decisions, audit, the console's accounts and session secret, the
waves' state, the retrain reports) have their plain names
(``seawall:models:active``); with K > 1 they carry the hash tag ``{shared}``
(``seawall:{shared}:models:active``, :meth:`worker.settings.Keys.shared`), so
the control plane's transactions stay in one Redis Cluster slot.  Going from
K = 1 to K > 1 (or back, or to another prefix) therefore renames them:
:func:`move_shared_state` copies each durable one to its new name with its
time to live (``DUMP``/``PTTL``/``RESTORE``: streams keep their consumer
groups, and it works between shards) and deletes the old one.  A key whose
new name already exists is left in place and counted as kept.

Short-lived keys are not moved: locks (``retrain:lock``, ``waves:lock``),
sign-in failure counters, the once-only markers of written decisions and the
workers' heartbeats all rebuild themselves.  The campaign state is the
campaign policy's to name; the per-comment and per-partition keys are
:mod:`ops.repartition`'s.
"""
from __future__ import annotations

import redis

from worker.settings import Keys

# Durable keys outside the partitions, as parts after the prefix (the names Keys and its users give them).
FIXED = (("feedback",), ("events",), ("labels",), ("decisions",), ("audit",), ("console", "accounts"),
         ("console", "secret"), ("models", "active"), ("models", "history"), ("models", "versions"),
         ("models", "replay"), ("models", "canary"))


def _s(value) -> str:
    return value.decode("utf-8", "replace") if isinstance(value, bytes) else str(value)


def shared_pairs(client, old: Keys, new: Keys) -> list[tuple[str, str]]:
    """``(old name, new name)`` of every durable shared key of ``old`` that exists, in a fixed order."""
    from ops.retrain import reports_key
    from ops.waves import wave_keys

    pairs = [(old.shared(*parts), new.shared(*parts)) for parts in FIXED]
    for name in ("state", "active", "cursor"):
        pairs.append((wave_keys(old)[name], wave_keys(new)[name]))
    pairs.append((reports_key(old), reports_key(new)))
    for version in (_s(v) for v in client.zrange(old.models_versions, 0, -1)):
        pairs.append((old.model_blob(version), new.model_blob(version)))
        pairs.append((old.model_meta(version), new.model_meta(version)))
    return [(a, b) for a, b in pairs if a != b and client.exists(a)]


def move_key(client, old_key: str, new_key: str) -> str:
    """Give ``old_key`` the name ``new_key`` with its time to live, across shards; ``"moved"``, ``"kept"`` (the
    new name is taken: nothing changes) or ``"gone"`` (the old key expired meanwhile).

    ``DUMP``/``PTTL``/``RESTORE`` then ``DEL``, not ``RENAME``: on a Redis Cluster the two names may live
    on different shards, and a stream keeps its consumer groups.
    """
    payload = client.dump(old_key)
    if payload is None:
        return "gone"
    ttl = client.pttl(old_key)
    try:
        client.restore(new_key, int(ttl) if ttl and ttl > 0 else 0, payload)
    except redis.ResponseError as exc:
        if "BUSYKEY" not in str(exc):
            raise
        return "kept"
    client.delete(old_key)
    return "moved"


def move_shared_state(client, old: Keys, new: Keys, *, dry_run: bool = False) -> dict[str, int]:
    """Rename the durable shared keys from ``old``'s layout to ``new``'s; returns ``{"moved", "kept"}``.

    Repeatable: a key already moved no longer exists under its old name.
    """
    counts = {"moved": 0, "kept": 0}
    for old_key, new_key in shared_pairs(client, old, new):
        outcome = "moved" if dry_run else move_key(client, old_key, new_key)
        if outcome in counts:
            counts[outcome] += 1
    return counts
