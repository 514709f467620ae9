"""Moderators' decisions on held comments: first one wins, undo for a few seconds, then final.

A decision on a held comment is *publish* (the label ``ham``) or *reject*
(``spam``).  Every script below touches the keys of one Redis Cluster hash
slot: either the comment's partition (its ``held`` set, ``text`` cache and
pending decision) or the shared keys (``feedback``, ``decisions``), never
both, so a partitioned deployment runs them on a cluster.  The steps:

1. :func:`claim` takes the comments out of their partition's ``held`` set
   and parks each in ``decisions:pending:{id}`` (and the partition's
   ``decisions:pending`` sorted set, scored by when the decision becomes
   final), one script per partition; the audit entries follow.  A comment no
   longer held (another moderator decided it first, or a re-score released it)
   is reported as *gone* and nothing is written for it: the first moderator
   wins.
2. :func:`undo` puts parked comments back in the queue with their original
   hold time, while their decision is not final yet; only the holder of the
   claim's random token can.
3. :func:`finalize_due` writes each parked decision whose undo window is over,
   in three steps that are each safe to repeat: *take* (in the partition: mark
   it ``writing``, so it can no longer be undone, and push its due time
   :data:`FINALIZE_RETRY_S` ahead, so a finalizer that dies mid-way leaves it
   to another), *write* (on the shared keys: the label on the ``feedback``
   stream and the final decision on the ``decisions`` stream, under a
   once-only marker ``decisions:written:{id}:{token}``, so no label is ever
   written twice) and *release* (in the partition).  Any number of processes
   may run it at once.

:func:`label_now` is the one-step form for scripts (``seawall feedback``):
the label is sent at once; a held comment is claimed and finalized in the
same call (the steps above with no undo window), so it leaves the queue and
its decision is written once.

Fields of a ``decisions`` entry (flat UTF-8 strings): ``id``, ``decision``
(publish|reject), ``label`` (ham|spam), ``moderator``, ``decided_at`` and
``held_at`` (epoch seconds), ``score``, ``model``, ``site``, ``rule``,
``campaign`` and ``stream_id`` as the verdict had them (empty when unknown),
``reason`` (the moderator's note) and ``source`` (console|cli).
"""
from __future__ import annotations

import json
import secrets
from collections.abc import Sequence
from dataclasses import dataclass, field

from model.actions import Action
from worker.labels import HAM, SPAM
from worker.settings import Keys

PUBLISH, REJECT = Action.PUBLISH, Action.REJECT
LABEL_OF = {PUBLISH: HAM, REJECT: SPAM}
ACTION_OF = {label: action for action, label in LABEL_OF.items()}
DECISIONS_MAXLEN = 1_000_000
AUDIT_MAXLEN = 1_000_000
MAX_IDS = 5_000  # comments per claim (a whole campaign family fits)
ID_MAX_BYTES = 256
NAME_MAX_BYTES = 128
REASON_MAX_BYTES = 1024

# The decision entry, built from a pending hash's fields; the README's table of the decisions stream lists them.
_DECISION_FIELDS = ("id", "decision", "label", "moderator", "decided_at", "held_at", "score", "model", "site",
                    "rule", "campaign", "stream_id", "reason", "source")
FINALIZE_RETRY_S = 30.0  # a finalizer that died between its steps leaves the decision to another after this
WRITTEN_TTL_S = 7 * 86_400  # how long a written decision's marker stops a second write of the same claim

# Step 1 (the comment's partition).  KEYS: held, deciding, then decision:{id} and text:{id} per comment.
# ARGV: final_at, token, moderator, action, label, reason, source, now, n, then per comment: id, feedback JSON.
_CLAIM = """
local held, deciding = KEYS[1], KEYS[2]
local final_at, token, moderator, action, label, reason, source, now =
  ARGV[1], ARGV[2], ARGV[3], ARGV[4], ARGV[5], ARGV[6], ARGV[7], ARGV[8]
local n = tonumber(ARGV[9])
local out = {}
for i = 1, n do
  local id, feedback = ARGV[8 + 2 * i], ARGV[9 + 2 * i]
  local parked, cache = KEYS[1 + 2 * i], KEYS[2 + 2 * i]
  local held_at = redis.call('ZSCORE', held, id)
  out[i] = 0
  if held_at then
    redis.call('ZREM', held, id)
    local c = redis.call('HMGET', cache, 'score', 'model', 'site', 'rule', 'campaign', 'stream_id')
    redis.call('DEL', parked)
    redis.call('HSET', parked, 'id', id, 'decision', action, 'label', label, 'moderator', moderator,
               'reason', reason, 'source', source, 'decided_at', now, 'held_at', held_at, 'token', token,
               'score', c[1] or '', 'model', c[2] or '', 'site', c[3] or '', 'rule', c[4] or '',
               'campaign', c[5] or '', 'stream_id', c[6] or '', 'feedback', feedback)
    redis.call('ZADD', deciding, final_at, id)
    out[i] = 1
  end
end
return out
"""

# The comment's partition.  KEYS: held, deciding, then decision:{id} per comment.  ARGV: token, n, ids...
# A decision whose writing has begun (``writing``) can no longer be undone.
_UNDO = """
local held, deciding = KEYS[1], KEYS[2]
local token = ARGV[1]
local n = tonumber(ARGV[2])
local out = {}
for i = 1, n do
  local id, parked = ARGV[2 + i], KEYS[2 + i]
  out[i] = 0
  if redis.call('ZSCORE', deciding, id) and redis.call('HGET', parked, 'token') == token
     and not redis.call('HGET', parked, 'writing') then
    local held_at = redis.call('HGET', parked, 'held_at')
    redis.call('ZADD', held, held_at, id)
    redis.call('ZREM', deciding, id)
    redis.call('DEL', parked)
    out[i] = 1
  end
end
return out
"""

# Step 2 (the comment's partition): take the due decisions for writing.  KEYS: deciding, then decision:{id} per
# comment.  ARGV: now, retry_at, n, ids...  Each taken decision stays in ``deciding`` at retry_at, marked
# ``writing``, so that if this finalizer dies another one writes it; a pending hash without a label is junk.
_TAKE = """
local deciding = KEYS[1]
local now, retry_at = tonumber(ARGV[1]), ARGV[2]
local n = tonumber(ARGV[3])
local out = {}
for i = 1, n do
  local id, parked = ARGV[3 + i], KEYS[1 + i]
  local due = redis.call('ZSCORE', deciding, id)
  out[i] = {}
  if due and tonumber(due) <= now then
    if redis.call('HEXISTS', parked, 'label') == 1 then
      redis.call('HSET', parked, 'writing', '1')
      redis.call('ZADD', deciding, retry_at, id)
      out[i] = redis.call('HGETALL', parked)
    else
      redis.call('ZREM', deciding, id)
      redis.call('DEL', parked)
    end
  end
end
return out
"""

# Step 3 (the shared keys): write each claim's label and decision once.  KEYS: feedback, decisions, then the
# written marker per claim.  ARGV: decisions maxlen, marker TTL, n, then per claim: the feedback entry's pair count
# and pairs, the decision entry's pair count (0: none) and pairs.  Returns per claim the feedback entry id, or
# false when the marker shows an earlier call wrote it.
_WRITE = """
local feedback, decisions = KEYS[1], KEYS[2]
local dmax, ttl = ARGV[1], ARGV[2]
local n = tonumber(ARGV[3])
local out = {}
local a = 4
for i = 1, n do
  local nf = tonumber(ARGV[a])
  local fb = {'XADD', feedback, '*'}
  for k = a + 1, a + 2 * nf do fb[#fb + 1] = ARGV[k] end
  a = a + 1 + 2 * nf
  local nd = tonumber(ARGV[a])
  local dec = {'XADD', decisions, 'MAXLEN', '~', dmax, '*'}
  for k = a + 1, a + 2 * nd do dec[#dec + 1] = ARGV[k] end
  a = a + 1 + 2 * nd
  out[i] = false
  if redis.call('SET', KEYS[2 + i], '1', 'NX', 'EX', ttl) then
    out[i] = redis.call(unpack(fb))
    if nd > 0 then redis.call(unpack(dec)) end
  end
end
return out
"""

# Step 4 (the comment's partition): the written decisions leave.  KEYS: deciding, then decision:{id} per comment.
# ARGV: n, then per comment: id, token.
_DONE = """
local deciding = KEYS[1]
local n = tonumber(ARGV[1])
for i = 1, n do
  local id, token, parked = ARGV[2 * i], ARGV[1 + 2 * i], KEYS[1 + i]
  if redis.call('HGET', parked, 'token') == token then
    redis.call('ZREM', deciding, id)
    redis.call('DEL', parked)
  end
end
return n
"""


@dataclass(frozen=True)
class Claim:
    """What :func:`claim` did: ``decided`` ids are parked until ``final_at``; ``gone`` ones were not held."""

    token: str
    action: str
    decided: list[str] = field(default_factory=list)
    gone: list[str] = field(default_factory=list)
    final_at: float = 0.0


def _s(value) -> str:
    return value.decode("utf-8", "replace") if isinstance(value, bytes) else str(value)


def _check_text(operation: str, name: str, value, max_bytes: int, *, empty_ok: bool) -> None:
    if not isinstance(value, str) or (not empty_ok and not value.strip()):
        raise ValueError(f"{operation}: {name} must be a non-empty string, got {value!r}")
    if len(value.encode("utf-8", "surrogatepass")) > max_bytes:
        raise ValueError(f"{operation}: {name} is longer than {max_bytes} bytes")


def check_ids(operation: str, ids: Sequence[str]) -> list[str]:
    """The ids, each once and in order; refuses an empty list, non-strings, too many or too long ids."""
    if isinstance(ids, (str, bytes)) or not isinstance(ids, Sequence) or not ids:
        raise ValueError(f"{operation}: give a non-empty list of comment ids")
    unique = list(dict.fromkeys(ids))
    if len(unique) > MAX_IDS:
        raise ValueError(f"{operation}: at most {MAX_IDS} comments at once, got {len(unique)}")
    for comment_id in unique:
        _check_text(operation, "a comment id", comment_id, ID_MAX_BYTES, empty_ok=False)
    return unique


def check_action(operation: str, action) -> str:
    if action not in LABEL_OF:
        raise ValueError(f"{operation}: action must be {PUBLISH!r} or {REJECT!r}, got {action!r}")
    return action


def _by_partition(keys: Keys, ids: Sequence[str]) -> dict[int, list[str]]:
    """The ids grouped by partition, each group in the order given."""
    groups: dict[int, list[str]] = {}
    for comment_id in ids:
        groups.setdefault(keys.partition_of(comment_id), []).append(comment_id)
    return groups


def _feedback_entry(fields: dict) -> str:
    return json.dumps(fields, separators=(",", ":"), ensure_ascii=False)


def _park(client, keys: Keys, ids: Sequence[str], *, token: str, final_at: float, moderator: str, action: str,
          reason: str, source: str, now: float, feedback: dict[str, str]) -> list[str]:
    """Step 1: move held comments into their partition's pending decisions; returns those that were held."""
    decided = []
    for p, group in _by_partition(keys, ids).items():
        part = keys.part(p)
        script_keys = [part.held, part.deciding]
        args = [f"{final_at:.3f}", token, moderator, action, LABEL_OF[action], reason, source, f"{float(now):.3f}",
                len(group)]
        for comment_id in group:
            script_keys += [part.decision(comment_id), part.text(comment_id)]
            args += [comment_id, _feedback_entry(feedback[comment_id])]
        flags = client.eval(_CLAIM, len(script_keys), *script_keys, *args)
        decided += [i for i, ok in zip(group, flags) if int(ok)]
    order = {comment_id: n for n, comment_id in enumerate(ids)}
    return sorted(decided, key=order.__getitem__)


def _audit_each(client, keys: Keys, event: str, ids: Sequence[str], fields: dict, *, now: float,
                maxlen: int) -> None:
    if not ids:
        return
    pipe = client.pipeline(transaction=False)
    for comment_id in ids:
        write_audit(client, keys, event, {"id": comment_id, **fields}, now=now, maxlen=maxlen, pipeline=pipe)
    pipe.execute()


def claim(client, keys: Keys, ids: Sequence[str], *, action: str, moderator: str, now: float, undo_s: float,
          reason: str = "", source: str = "console", audit_maxlen: int = AUDIT_MAXLEN) -> Claim:
    """Take held comments out of the queue for ``moderator``'s decision, final after ``undo_s`` seconds.

    Atomic per comment (one script per partition, on the partition's keys):
    of two moderators claiming the same comment, exactly one gets it in
    ``decided``, the other in ``gone``.  The audit entries follow the claim.
    """
    ids = check_ids("claim", ids)
    check_action("claim", action)
    _check_text("claim", "moderator", moderator, NAME_MAX_BYTES, empty_ok=False)
    _check_text("claim", "reason", reason, REASON_MAX_BYTES, empty_ok=True)
    if isinstance(undo_s, bool) or not isinstance(undo_s, (int, float)) or not 0 <= undo_s <= 3600:
        raise ValueError(f"claim: undo_s must be a number of seconds in [0, 3600], got {undo_s!r}")
    token = secrets.token_urlsafe(16)
    final_at = float(now) + float(undo_s)
    feedback = {i: {"id": i, "label": LABEL_OF[action], "moderator": moderator, "reason": reason, "source": source}
                for i in ids}
    decided = _park(client, keys, ids, token=token, final_at=final_at, moderator=moderator, action=action,
                    reason=reason, source=source, now=now, feedback=feedback)
    _audit_each(client, keys, "decide", decided, {"decision": action, "moderator": moderator, "source": source},
                now=now, maxlen=audit_maxlen)
    taken = set(decided)
    gone = [i for i in ids if i not in taken]
    return Claim(token=token, action=action, decided=decided, gone=gone, final_at=final_at)


def undo(client, keys: Keys, token: str, ids: Sequence[str], *, moderator: str, now: float,
         audit_maxlen: int = AUDIT_MAXLEN) -> list[str]:
    """Put the claim's comments back in the queue if their decision is not final yet; returns those restored."""
    ids = check_ids("undo", ids)
    _check_text("undo", "token", token, 64, empty_ok=False)
    restored = []
    for p, group in _by_partition(keys, ids).items():
        part = keys.part(p)
        script_keys = [part.held, part.deciding] + [part.decision(i) for i in group]
        flags = client.eval(_UNDO, len(script_keys), *script_keys, token, len(group), *group)
        restored += [i for i, ok in zip(group, flags) if int(ok)]
    back = set(restored)
    restored = [i for i in ids if i in back]
    _audit_each(client, keys, "undo", restored, {"moderator": moderator}, now=now, maxlen=audit_maxlen)
    return restored


def _pairs(raw) -> dict[str, str]:
    flat = [_s(x) for x in raw]
    return dict(zip(flat[0::2], flat[1::2]))


def _feedback_of(parked: dict[str, str]) -> dict[str, str]:
    """The feedback entry the claim recorded (a pending hash from before it did gets the console's form)."""
    try:
        recorded = json.loads(parked.get("feedback", ""))
    except ValueError:
        recorded = None
    if isinstance(recorded, dict) and recorded.get("id") == parked.get("id"):
        return {str(k): str(v) for k, v in recorded.items()}
    return {"id": parked.get("id", ""), "label": parked.get("label", ""), "moderator": parked.get("moderator", ""),
            "reason": parked.get("reason", ""), "source": parked.get("source", "")}


def _write_once(client, keys: Keys, taken: list[dict[str, str]], *, decisions_maxlen: int) -> list:
    """Step 3: each taken claim's label and decision, written once whoever repeats it; its feedback id or None."""
    if not taken:
        return []
    script_keys = [keys.feedback, keys.decisions] + [keys.decision_written(t["id"], t["token"]) for t in taken]
    args: list = [decisions_maxlen, int(WRITTEN_TTL_S), len(taken)]
    for parked in taken:
        fb = _feedback_of(parked)
        args += [len(fb), *[x for pair in fb.items() for x in pair]]
        args += [len(_DECISION_FIELDS), *[x for name in _DECISION_FIELDS for x in (name, parked.get(name, ""))]]
    return [_s(r) if r else None for r in client.eval(_WRITE, len(script_keys), *script_keys, *args)]


def _finish(client, keys: Keys, ids: Sequence[str], *, now: float, decisions_maxlen: int) -> dict[str, str]:
    """Steps 2 to 4 for ``ids``: take the due ones, write them once, let them go; ``{id: feedback id}`` written."""
    written: dict[str, str] = {}
    retry_at = f"{float(now) + FINALIZE_RETRY_S:.3f}"
    for p, group in _by_partition(keys, ids).items():
        part = keys.part(p)
        script_keys = [part.deciding] + [part.decision(i) for i in group]
        replies = client.eval(_TAKE, len(script_keys), *script_keys, f"{float(now):.3f}", retry_at, len(group),
                              *group)
        taken = [_pairs(r) for r in replies if r]
        for parked, feedback_id in zip(taken, _write_once(client, keys, taken, decisions_maxlen=decisions_maxlen)):
            if feedback_id is not None:
                written[parked["id"]] = feedback_id
        if taken:
            done_keys = [part.deciding] + [part.decision(t["id"]) for t in taken]
            client.eval(_DONE, len(done_keys), *done_keys, len(taken),
                        *[x for t in taken for x in (t["id"], t["token"])])
    return written


def finalize(client, keys: Keys, ids: Sequence[str], *, now: float,
             decisions_maxlen: int = DECISIONS_MAXLEN) -> list[str]:
    """Write the label and the decision of each listed comment whose undo window is over; returns those written.

    Safe to run from any number of processes at once, and to repeat after a
    crash: a decision is taken in its partition, written to the shared
    feedback and decisions streams under a once-only marker, then released.
    """
    if not ids:
        return []
    written = _finish(client, keys, list(dict.fromkeys(ids)), now=now, decisions_maxlen=decisions_maxlen)
    return [i for i in dict.fromkeys(ids) if i in written]


def finalize_due(client, keys: Keys, *, now: float, batch: int = 500,
                 decisions_maxlen: int = DECISIONS_MAXLEN) -> int:
    """Finalize every decision whose undo window is over, in every partition; safe from any number of processes."""
    total = 0
    for part in keys.parts:
        while True:
            due = [_s(m) for m in client.zrangebyscore(part.deciding, "-inf", f"{float(now):.3f}", start=0,
                                                        num=batch)]
            if not due:
                break
            total += len(finalize(client, keys, due, now=now, decisions_maxlen=decisions_maxlen))
            if len(due) < batch:
                break
    return total


def pending_count(client, keys: Keys) -> int:
    """Decisions still inside their undo window, over every partition."""
    pipe = client.pipeline(transaction=False)
    for part in keys.parts:
        pipe.zcard(part.deciding)
    return sum(int(n) for n in pipe.execute())


def label_now(client, keys: Keys, comment_id: str, label: str, *, moderator: str = "", reason: str = "",
              text: str | None = None, now: float, source: str = "cli",
              decisions_maxlen: int = DECISIONS_MAXLEN) -> dict:
    """Send one label at once; a held comment also leaves the queue and gets its decision written.

    A held comment is claimed and finalized at once (the same steps as the
    console's, with no undo window); any other gets only the label.
    Returns ``{"feedback_id": ..., "decided": bool}``.
    """
    check_ids("label", [comment_id])
    if label not in ACTION_OF:
        raise ValueError(f"label: label must be 'spam' or 'ham', got {label!r}")
    _check_text("label", "moderator", moderator, NAME_MAX_BYTES, empty_ok=True)
    _check_text("label", "reason", reason, REASON_MAX_BYTES, empty_ok=True)
    entry = {"id": comment_id, "label": label}
    entry.update({k: v for k, v in (("moderator", moderator), ("reason", reason)) if v})
    if text is not None:
        entry["text"] = text
    decided = _park(client, keys, [comment_id], token=secrets.token_urlsafe(16), final_at=float(now),
                    moderator=moderator, action=ACTION_OF[label], reason=reason, source=source, now=now,
                    feedback={comment_id: entry})
    if decided:
        written = _finish(client, keys, decided, now=now, decisions_maxlen=decisions_maxlen)
        if comment_id in written:
            return {"feedback_id": written[comment_id], "decided": True}
        # Another process finalized the decision between the two steps: it wrote the same entries.
        return {"feedback_id": "", "decided": True}
    feedback_id = client.xadd(keys.feedback, entry)
    return {"feedback_id": _s(feedback_id), "decided": False}


def move_pending(client, old: Keys, new: Keys, *, dry_run: bool = False) -> int:
    """Move the decisions inside their undo window from ``old``'s partitions to ``new``'s; returns how many.

    For a change of ``keys.partitions``: each pending hash and its place in the
    undo set go to the comment's new partition, with the time it becomes
    final.  A console stopped cleanly leaves none (it waits out the windows).
    """
    moved = 0
    for part in old.parts:
        for member, final_at in client.zrange(part.deciding, 0, -1, withscores=True):
            comment_id = _s(member)
            target = new.part_of(comment_id)
            if target.deciding == part.deciding and target.decision(comment_id) == part.decision(comment_id):
                continue
            moved += 1
            if dry_run:
                continue
            parked = client.hgetall(part.decision(comment_id))
            if parked:
                client.hset(target.decision(comment_id), mapping=parked)
            client.zadd(target.deciding, {comment_id: final_at})
            client.zrem(part.deciding, comment_id)
            client.delete(part.decision(comment_id))
    return moved


def write_audit(client, keys: Keys, event: str, fields: dict, *, now: float, maxlen: int = AUDIT_MAXLEN,
                pipeline=None):
    """One audit entry (``event``, ``ts`` and flat string fields) for actions outside a decision."""
    if not isinstance(event, str) or not event:
        raise ValueError(f"write_audit: event must be a non-empty string, got {event!r}")
    entry = {"event": event, "ts": f"{float(now):.3f}"}
    entry.update({str(k): str(v) for k, v in fields.items()})
    pipe = pipeline if pipeline is not None else client.pipeline(transaction=False)
    pipe.xadd(keys.audit, entry, maxlen=maxlen, approximate=True)
    if pipeline is None:
        return pipe.execute()[0]
    return None


def read_decisions(client, keys: Keys, *, count: int = 100) -> list[tuple[str, dict[str, str]]]:
    """The newest ``count`` entries of the decisions stream, newest first, as string maps."""
    return [(_s(sid), {_s(k): _s(v) for k, v in f.items()})
            for sid, f in client.xrevrange(keys.decisions, count=count)]
