"""Moderators' decisions on held comments: first one wins, undo for a few seconds, then final.

A decision on a held comment is *publish* (the label ``ham``) or *reject*
(``spam``).  It goes through three steps, each one Lua call so that it is
atomic against every other moderator, console process and worker:

1. :func:`claim` takes the comments out of the ``held`` queue and parks each
   in ``decisions:pending:{id}`` (and the ``decisions:pending`` sorted set,
   scored by when the decision becomes final), with an audit entry.  A comment
   no longer held (another moderator decided it first, or a re-score released
   it) is reported as *gone* and nothing is written for it.
2. :func:`undo` puts parked comments back in the queue with their original
   hold time, while their decision is not final yet; only the holder of the
   claim's random token can.
3. :func:`finalize_due` writes each parked decision whose undo window is over:
   the label on the ``feedback`` stream (moderator = who decided) and the
   final decision on the ``decisions`` stream that the site's application
   consumes.  It re-checks each comment inside the script, so any number of
   processes may run it at once and every decision is written exactly once.

:func:`label_now` is the one-step form for scripts (``seawall feedback``):
the label is sent at once, and if the comment was held it leaves the queue
and its decision is written in the same call.

Fields of a ``decisions`` entry (flat UTF-8 strings): ``id``, ``decision``
(publish|reject), ``label`` (ham|spam), ``moderator``, ``decided_at`` and
``held_at`` (epoch seconds), ``score``, ``model``, ``site``, ``rule``,
``campaign`` and ``stream_id`` as the verdict had them (empty when unknown),
``reason`` (the moderator's note) and ``source`` (console|cli).
"""
from __future__ import annotations

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

# The decision entry, built from a pending hash's fields or the cache; shared by both writers.
_DECISION_FIELDS = ("id", "decision", "label", "moderator", "decided_at", "held_at", "score", "model", "site",
                    "rule", "campaign", "stream_id", "reason", "source")
_ENTRY_LUA = """
local DECISION_FIELDS = {%s}
local function entry_of(map)
  local out = {}
  for _, name in ipairs(DECISION_FIELDS) do
    out[#out + 1] = name
    out[#out + 1] = map[name] or ''
  end
  return out
end
""" % ", ".join(f"'{name}'" for name in _DECISION_FIELDS)

# KEYS: held, deciding, audit, then decision:{id} and text:{id} per comment.
# ARGV: final_at, audit maxlen, token, moderator, action, label, reason, source, now, n, ids...
_CLAIM = """
local held, deciding, audit = KEYS[1], KEYS[2], KEYS[3]
local final_at, amax, token, moderator, action, label, reason, source, now =
  ARGV[1], ARGV[2], ARGV[3], ARGV[4], ARGV[5], ARGV[6], ARGV[7], ARGV[8], ARGV[9]
local n = tonumber(ARGV[10])
local out = {}
for i = 1, n do
  local id = ARGV[10 + i]
  local parked, cache = KEYS[2 + 2 * i], KEYS[3 + 2 * i]
  local held_at = redis.call('ZSCORE', held, id)
  out[i] = 0
  if held_at then
    redis.call('ZREM', held, id)
    local c = redis.call('HMGET', cache, 'score', 'model', 'site', 'rule', 'campaign', 'stream_id')
    redis.call('DEL', parked)
    redis.call('HSET', parked, 'id', id, 'decision', action, 'label', label, 'moderator', moderator,
               'reason', reason, 'source', source, 'decided_at', now, 'held_at', held_at, 'token', token,
               'score', c[1] or '', 'model', c[2] or '', 'site', c[3] or '', 'rule', c[4] or '',
               'campaign', c[5] or '', 'stream_id', c[6] or '')
    redis.call('ZADD', deciding, final_at, id)
    redis.call('XADD', audit, 'MAXLEN', '~', amax, '*', 'event', 'decide', 'id', id, 'decision', action,
               'moderator', moderator, 'source', source, 'ts', now)
    out[i] = 1
  end
end
return out
"""

# KEYS: held, deciding, audit, then decision:{id} per comment.  ARGV: token, moderator, now, audit maxlen, n, ids...
_UNDO = """
local held, deciding, audit = KEYS[1], KEYS[2], KEYS[3]
local token, moderator, now, amax = ARGV[1], ARGV[2], ARGV[3], ARGV[4]
local n = tonumber(ARGV[5])
local out = {}
for i = 1, n do
  local id, parked = ARGV[5 + i], KEYS[3 + i]
  out[i] = 0
  if redis.call('ZSCORE', deciding, id) and redis.call('HGET', parked, 'token') == token then
    local held_at = redis.call('HGET', parked, 'held_at')
    redis.call('ZADD', held, held_at, id)
    redis.call('ZREM', deciding, id)
    redis.call('DEL', parked)
    redis.call('XADD', audit, 'MAXLEN', '~', amax, '*', 'event', 'undo', 'id', id, 'moderator', moderator, 'ts', now)
    out[i] = 1
  end
end
return out
"""

# KEYS: deciding, feedback, decisions, then decision:{id} per comment.  ARGV: now, decisions maxlen, n, ids...
_FINALIZE = _ENTRY_LUA + """
local deciding, feedback, decisions = KEYS[1], KEYS[2], KEYS[3]
local now, dmax = tonumber(ARGV[1]), ARGV[2]
local n = tonumber(ARGV[3])
local out = {}
for i = 1, n do
  local id, parked = ARGV[3 + i], KEYS[3 + i]
  local due = redis.call('ZSCORE', deciding, id)
  out[i] = 0
  if due and tonumber(due) <= now then
    local flat = redis.call('HGETALL', parked)
    local map = {}
    for k = 1, #flat, 2 do map[flat[k]] = flat[k + 1] end
    if map['label'] then
      redis.call('XADD', feedback, '*', 'id', id, 'label', map['label'], 'moderator', map['moderator'] or '',
                 'reason', map['reason'] or '', 'source', map['source'] or '')
      local entry = entry_of(map)
      redis.call('XADD', decisions, 'MAXLEN', '~', dmax, '*', unpack(entry))
      out[i] = 1
    end
    redis.call('ZREM', deciding, id)
    redis.call('DEL', parked)
  end
end
return out
"""

# KEYS: held, feedback, decisions, text:{id}.
# ARGV: id, label, action, moderator, reason, source, now, decisions maxlen, has_text, text
_LABEL_NOW = _ENTRY_LUA + """
local held, feedback, decisions, cache = KEYS[1], KEYS[2], KEYS[3], KEYS[4]
local id, label, action, moderator, reason, source, now, dmax, has_text, text =
  ARGV[1], ARGV[2], ARGV[3], ARGV[4], ARGV[5], ARGV[6], ARGV[7], ARGV[8], ARGV[9], ARGV[10]
local held_at = redis.call('ZSCORE', held, id)
if held_at then
  redis.call('ZREM', held, id)
  local c = redis.call('HMGET', cache, 'score', 'model', 'site', 'rule', 'campaign', 'stream_id')
  local map = {id = id, decision = action, label = label, moderator = moderator, decided_at = now, held_at = held_at,
               score = c[1] or '', model = c[2] or '', site = c[3] or '', rule = c[4] or '', campaign = c[5] or '',
               stream_id = c[6] or '', reason = reason, source = source}
  redis.call('XADD', decisions, 'MAXLEN', '~', dmax, '*', unpack(entry_of(map)))
end
local fields = {'id', id, 'label', label}
if moderator ~= '' then fields[#fields + 1] = 'moderator'; fields[#fields + 1] = moderator end
if reason ~= '' then fields[#fields + 1] = 'reason'; fields[#fields + 1] = reason end
if has_text == '1' then fields[#fields + 1] = 'text'; fields[#fields + 1] = text end
local fid = redis.call('XADD', feedback, '*', unpack(fields))
return {held_at and 1 or 0, fid}
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


def claim(client, keys: Keys, ids: Sequence[str], *, action: str, moderator: str, now: float, undo_s: float,
          reason: str = "", source: str = "console", audit_maxlen: int = AUDIT_MAXLEN) -> Claim:
    """Take held comments out of the queue for ``moderator``'s decision, final after ``undo_s`` seconds.

    Atomic: of two moderators claiming the same comment, exactly one gets it
    in ``decided``, the other in ``gone``.
    """
    ids = check_ids("claim", ids)
    check_action("claim", action)
    _check_text("claim", "moderator", moderator, NAME_MAX_BYTES, empty_ok=False)
    _check_text("claim", "reason", reason, REASON_MAX_BYTES, empty_ok=True)
    if isinstance(undo_s, bool) or not isinstance(undo_s, (int, float)) or not 0 <= undo_s <= 3600:
        raise ValueError(f"claim: undo_s must be a number of seconds in [0, 3600], got {undo_s!r}")
    token = secrets.token_urlsafe(16)
    final_at = float(now) + float(undo_s)
    script_keys = [keys.held, keys.deciding, keys.audit]
    for comment_id in ids:
        script_keys += [keys.decision(comment_id), keys.text(comment_id)]
    args = [f"{final_at:.3f}", audit_maxlen, token, moderator, action, LABEL_OF[action], reason, source,
            f"{float(now):.3f}", len(ids), *ids]
    flags = client.eval(_CLAIM, len(script_keys), *script_keys, *args)
    decided = [i for i, ok in zip(ids, flags) if int(ok)]
    gone = [i for i, ok in zip(ids, flags) if not int(ok)]
    return Claim(token=token, action=action, decided=decided, gone=gone, final_at=final_at)


def undo(client, keys: Keys, token: str, ids: Sequence[str], *, moderator: str, now: float,
         audit_maxlen: int = AUDIT_MAXLEN) -> list[str]:
    """Put the claim's comments back in the queue if their decision is not final yet; returns those restored."""
    ids = check_ids("undo", ids)
    _check_text("undo", "token", token, 64, empty_ok=False)
    script_keys = [keys.held, keys.deciding, keys.audit] + [keys.decision(i) for i in ids]
    flags = client.eval(_UNDO, len(script_keys), *script_keys, token, moderator, f"{float(now):.3f}",
                        audit_maxlen, len(ids), *ids)
    return [i for i, ok in zip(ids, flags) if int(ok)]


def finalize(client, keys: Keys, ids: Sequence[str], *, now: float,
             decisions_maxlen: int = DECISIONS_MAXLEN) -> list[str]:
    """Write the label and the decision of each listed comment whose undo window is over; returns those written."""
    if not ids:
        return []
    script_keys = [keys.deciding, keys.feedback, keys.decisions] + [keys.decision(i) for i in ids]
    flags = client.eval(_FINALIZE, len(script_keys), *script_keys, f"{float(now):.3f}", decisions_maxlen,
                        len(ids), *ids)
    return [i for i, ok in zip(ids, flags) if int(ok)]


def finalize_due(client, keys: Keys, *, now: float, batch: int = 500,
                 decisions_maxlen: int = DECISIONS_MAXLEN) -> int:
    """Finalize every decision whose undo window is over; safe to run from any number of processes."""
    total = 0
    while True:
        due = [_s(m) for m in client.zrangebyscore(keys.deciding, "-inf", f"{float(now):.3f}", start=0, num=batch)]
        if not due:
            return total
        total += len(finalize(client, keys, due, now=now, decisions_maxlen=decisions_maxlen))
        if len(due) < batch:
            return total


def pending_count(client, keys: Keys) -> int:
    """Decisions still inside their undo window."""
    return int(client.zcard(keys.deciding))


def label_now(client, keys: Keys, comment_id: str, label: str, *, moderator: str = "", reason: str = "",
              text: str | None = None, now: float, source: str = "cli",
              decisions_maxlen: int = DECISIONS_MAXLEN) -> dict:
    """Send one label at once; a held comment also leaves the queue and gets its decision written.

    Returns ``{"feedback_id": ..., "decided": bool}``.
    """
    check_ids("label", [comment_id])
    if label not in ACTION_OF:
        raise ValueError(f"label: label must be 'spam' or 'ham', got {label!r}")
    _check_text("label", "moderator", moderator, NAME_MAX_BYTES, empty_ok=True)
    _check_text("label", "reason", reason, REASON_MAX_BYTES, empty_ok=True)
    script_keys = [keys.held, keys.feedback, keys.decisions, keys.text(comment_id)]
    decided, feedback_id = client.eval(
        _LABEL_NOW, len(script_keys), *script_keys, comment_id, label, ACTION_OF[label], moderator, reason, source,
        f"{float(now):.3f}", decisions_maxlen, "1" if text is not None else "0", text if text is not None else "")
    return {"feedback_id": _s(feedback_id), "decided": bool(int(decided))}


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
