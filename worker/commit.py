"""The one write of a batch: every verdict with its cache, counters and XACK, atomically.

A batch is committed by one Lua script call (one round trip).  Redis runs a
script without interleaving other clients, so for each comment the verdict
XADD, the ``text:{id}`` cache, the ``held`` entry, the ``rates:{minute}``
counts, the per-id marker that the text was judged and the XACK land together; a worker
SIGKILLed mid-batch has written either a whole comment or nothing of it, and
its unacked entries are read again.

The script gets only the keys of the partition the batch was read from
(:mod:`worker.partitions`): its comment, verdict, hold, rates and dead-letter
keys, and each comment's ``done`` and ``text`` keys, all under the partition's
hash tag, so on a Redis Cluster the call touches one hash slot.  It builds no
key name itself.  A batch read from a source without partitions (RabbitMQ) is
split by the partition of each comment id and committed one script per
partition (:meth:`BatchCommitter.commit`).

Exactly one verdict per comment id *and text*, checked before anything is written:

1. the entry is still pending **for this consumer** (one ``XPENDING`` over the
   batch's id range, filtered by consumer).  Only an entry's current owner
   commits it: when a slow worker's entries were taken over (XAUTOCLAIM moves
   ownership) and both finish, the slow one finds them no longer its own, or
   already acked, and writes nothing;
2. the comment's ``text:{id}`` hash (the cached text and verdict) does not
   mark this text's digest as judged (a field ``~<digest>`` -> version, and
   ``~``: how many texts of the id were judged).  This catches what the pending list cannot: the same comment sent
   twice by a producer that retried its XADD, a group recreated at ``0``, a
   replay.  The same id with *another* text is an edit: it gets its own
   verdict, version ``~ + 1``, marked ``edit=1``.  The markers live as long
   as the cached text (``text_cache_ttl_s``, 14 days by default).  When
   ``done_ttl_s`` is the longer of the two, every marker is also written to
   ``done:{id}`` (a hash: text digest -> version) with that TTL, and it is
   read whenever the cache does not mark the text.  A cache without ``~`` was
   written by an older Seawall: its ``done:{id}`` decides (a string there
   counts as "this id has its verdict").  An older worker does not read the
   markers in the cache, so workers of both versions must not serve one
   deployment together.  Use ``maxmemory-policy noeviction`` (Redis's
   default, which RQ needs too) so markers are never evicted early.

Redis does not roll a script back when a command fails half-way, so the
writes are ordered for the failures that can happen: the verdict XADD comes
first (an out-of-memory server refuses a script's first write, and nothing
else has been touched), the cache with its marker right after it (from then on a
retry cannot write a second verdict), one XACK of the whole batch last (a comment
is never acked without its verdict).  Holds, counters and acks are batched
into one command each (the hold queue follows each id's latest version: an
edit that is not held leaves it).  Dead letters: XADD, then XACK, one by one.

The batch's rows travel as one JSON argument that the script decodes with
``cjson``, and what an action means (held? counted?) comes as per-row flags
computed in Python (:func:`action_flags`): the script never compares action names.
"""
from __future__ import annotations

import hashlib
import json
from collections.abc import Sequence
from dataclasses import dataclass

from redis.exceptions import NoScriptError

from worker.routing import HOLD, PUBLISH, REJECT
from worker.settings import Keys
from worker.streams import stream_id_order as _id_order
from worker.validation import DeadLetter
from worker.verdicts import Verdict as Scored  # the verdict record; its home is worker/verdicts.py

WRITTEN = 1
DUPLICATE = 0

# Per-row flags of the commit script, computed here from the action: the script never reads an action.
HOLD_FLAG = 1  # the comment joins the hold queue
COUNT_FLAG = 2  # the comment counts under "<site>:<action>" in rates:{minute} besides "<site>:total"
_ACTION_FLAGS = {PUBLISH: 0, HOLD: HOLD_FLAG | COUNT_FLAG, REJECT: COUNT_FLAG}

# Rows travel as one JSON argument (decoded by the script with cjson) instead of a dozen arguments each:
# a fraction of the encoding and parsing on both sides.  Text goes as UTF-8, not as \u escapes.
_dumps = json.JSONEncoder(ensure_ascii=False, separators=(",", ":"), check_circular=False).encode


def action_flags(action: str) -> int:
    """The commit script's flags for ``action``: an action this table does not know is counted, never held."""
    return _ACTION_FLAGS.get(action, COUNT_FLAG)

COMMIT_LUA = r"""
local stream, verdicts, held, rates, deadletter = KEYS[1], KEYS[2], KEYS[3], KEYS[4], KEYS[5]
local group, vmax, text_ttl, done_ttl, rates_ttl, now, model, dmax =
    ARGV[1], ARGV[2], ARGV[3], ARGV[4], ARGV[5], ARGV[6], ARGV[7], ARGV[8]
local consumer, first, last, span = ARGV[9], ARGV[10], ARGV[11], ARGV[12]
local split = tonumber(done_ttl) > tonumber(text_ttl)  -- markers outlive the cache: keep them in done:{id} too
-- One JSON array of rows: {stream id, id, score, flags, reasons, site, text, author, ts, rule, campaign,
-- digest, action, counter}; flags (from Python): 1 hold the comment, 2 count it under its counter field.
local rows = cjson.decode(ARGV[13])
local dead = cjson.decode(ARGV[14])  -- {stream id, {name, value, ...}} per dead letter
local n = #rows
local out, acks, counts, fields = {}, {}, {}, {}
local held_state, held_ids = {}, {}  -- id -> true (add) | false (remove), the id's latest version wins
-- The batch's entries this consumer still owns: one read of its pending list over the batch's id range.
-- An empty group: the transport acknowledges outside Redis, and the done markers alone decide.
local mine = nil
if group ~= '' then
  mine = {}
  for _, row in ipairs(redis.call('XPENDING', stream, group, first, last, span, consumer)) do mine[row[1]] = true end
end
local function still_pending(sid)
  return mine == nil or mine[sid] == true
end
local function count(field)
  if counts[field] == nil then counts[field] = 0; fields[#fields + 1] = field end
  counts[field] = counts[field] + 1
end
local function set_held(id, state)
  if held_state[id] == nil then held_ids[#held_ids + 1] = id end
  held_state[id] = state
end
for i = 1, n do
  local r = rows[i]
  local sid, id, score, flags, reasons, site, text, author, ts, rule, campaign, digest, action, counter =
      r[1], r[2], r[3], r[4], r[5], r[6], r[7], r[8], r[9], r[10], r[11], r[12], r[13], r[14]
  local done, cache = KEYS[4 + 2 * i], KEYS[5 + 2 * i]
  out[i] = 0
  if still_pending(sid) then
    -- The cache hash keeps, beside the latest version's fields, a marker per text judged ('~' .. digest ->
    -- version) and how many there are ('~').  A cache without '~' was written by an older Seawall: its
    -- done:{id} decides, as it does when markers must outlive the cache (split: done_ttl > text_ttl).
    local version = 0
    local got = redis.call('HMGET', cache, '~', '~' .. digest, 'text')
    if got[1] and not (split and not got[2]) then
      if not got[2] then version = tonumber(got[1]) + 1 end
    elseif got[3] or split then
      -- done:{id} maps each text digest already judged to its version; a string is an older worker's marker.
      local seen = redis.pcall('HLEN', done)
      if type(seen) ~= 'number' then
        version = 0
      elseif seen == 0 then
        version = tonumber(got[1] or 0) + 1
      elseif not redis.call('HGET', done, digest) then  -- HGET: the worker's ACL rule lists no HEXISTS
        version = math.max(seen, tonumber(got[1] or 0)) + 1
      end
    else
      version = 1
    end
    if version > 0 then
      if version == 1 and campaign == '' then
        redis.call('XADD', verdicts, 'MAXLEN', '~', vmax, '*', 'id', id, 'score', score, 'action', action,
                   'rule', rule, 'model', model, 'reasons', reasons, 'site', site, 'stream_id', sid,
                   'version', '1', 'digest', digest)
      else
        local entry = {'XADD', verdicts, 'MAXLEN', '~', vmax, '*', 'id', id, 'score', score, 'action', action,
                       'rule', rule, 'model', model, 'reasons', reasons, 'site', site, 'stream_id', sid,
                       'version', tostring(version), 'digest', digest}
        if campaign ~= '' then entry[#entry + 1] = 'campaign'; entry[#entry + 1] = campaign end
        if version > 1 then entry[#entry + 1] = 'edit'; entry[#entry + 1] = '1' end
        redis.call(unpack(entry))
      end
      if split then
        redis.call('HSET', done, digest, version)
        redis.call('EXPIRE', done, done_ttl)
      end
      redis.call('HSET', cache, 'text', text, 'site', site, 'author', author, 'ts', ts, 'stream_id', sid,
                 'score', score, 'action', action, 'rule', rule, 'model', model, 'version', version, 'digest', digest,
                 'reasons', reasons, 'campaign', campaign, '~', version, '~' .. digest, version)
      redis.call('EXPIRE', cache, text_ttl)
      if flags % 2 == 1 then set_held(id, true) elseif version > 1 then set_held(id, false) end
      count(site .. ':total')
      if flags >= 2 then count(counter) end
      out[i] = 1
    end
    acks[#acks + 1] = sid
  end
end
local holds, releases = {}, {}
for _, id in ipairs(held_ids) do
  if held_state[id] then holds[#holds + 1] = now; holds[#holds + 1] = id
  else releases[#releases + 1] = id end
end
if #holds > 0 then redis.call('ZADD', held, unpack(holds)) end
if #releases > 0 then redis.call('ZREM', held, unpack(releases)) end
if #fields > 0 then
  for _, field in ipairs(fields) do redis.call('HINCRBY', rates, field, counts[field]) end
  redis.call('EXPIRE', rates, rates_ttl)
end
-- Acked last: a script stopped by a refused command leaves no comment acked without its verdict.
if #acks > 0 and mine then redis.call('XACK', stream, group, unpack(acks)) end
for j, d in ipairs(dead) do
  out[n + j] = 0
  if still_pending(d[1]) then
    local cmd = {'XADD', deadletter, 'MAXLEN', '~', dmax, '*'}
    for _, v in ipairs(d[2]) do cmd[#cmd + 1] = v end
    redis.call(unpack(cmd))
    if mine then redis.call('XACK', stream, group, d[1]) end
    out[n + j] = 1
  end
end
return out
"""


def text_digest(text: str) -> str:
    """The verdict's ``digest``: the first 16 hex digits of SHA-256 of the text in UTF-8.

    Examples
    --------
    >>> text_digest("See you at the meeting")
    'e122dd469f03179e'
    """
    return hashlib.sha256(text.encode("utf-8", "surrogatepass")).hexdigest()[:16]


@dataclass(frozen=True, slots=True)
class Limits:
    """The TTLs and stream caps a commit applies (from WorkerSettings)."""

    verdicts_maxlen: int
    deadletter_maxlen: int
    text_cache_ttl_s: int
    done_ttl_s: int
    rates_ttl_s: int

    @classmethod
    def from_settings(cls, settings) -> "Limits":
        return cls(**{name: getattr(settings, name) for name in cls.__dataclass_fields__})


class BatchCommitter:
    """Builds and runs the commit script for one consumer group.

    Parameters
    ----------
    keys : the deployment's key names.
    limits : stream caps and TTLs.
    acknowledges : False when the entries did not come from the ``comments`` stream (a RabbitMQ
        source acknowledges its own messages): no pending check, no XACK; the done markers decide.
    source : what dead letters name as their ``source`` (default: the partition's ``comments`` stream).
    """

    def __init__(self, *, keys: Keys, limits: Limits, acknowledges: bool = True, source: str = ""):
        self.keys = keys
        self.limits = limits
        self.acknowledges = acknowledges
        self.source = source
        self._sha = None

    def arguments(self, scored: Sequence[Scored], dead: Sequence[DeadLetter], *, model: str, now: float,
                  consumer: str, partition: int = 0):
        """``(keys, args)`` of the script call for ``partition``; pure, so tests can inspect them.

        Every comment of ``scored`` must belong to ``partition`` (the worker
        dead-letters the others as ``wrong_partition`` before scoring).
        """
        k = self.keys.part(partition)
        lim = self.limits
        keys = [k.comments, k.verdicts, k.held, k.rates(int(now // 60)), k.deadletter]
        ids = [s.comment.stream_id for s in scored] + [d.stream_id for d in dead]
        first, last = min(ids, key=_id_order), max(ids, key=_id_order)
        span = 2 * len(ids) + 64  # room for leftovers of an earlier failed commit in the same range
        args = [self.keys.group if self.acknowledges else "", lim.verdicts_maxlen, lim.text_cache_ttl_s,
                lim.done_ttl_s, lim.rates_ttl_s, f"{now:.3f}", model, lim.deadletter_maxlen, consumer, first, last, span]
        rows = []
        partitions = self.keys.partitions
        for s in scored:
            c = s.comment
            if partitions > 1 and self.keys.partition_of(c.id) != partition:
                raise ValueError(f"BatchCommitter.arguments: comment id {c.id!r} belongs to partition "
                                 f"{self.keys.partition_of(c.id)}, not {partition}")
            keys.append(k.done(c.id))
            keys.append(k.text(c.id))
            flags = action_flags(s.action)
            rows.append((c.stream_id, c.id, s.score, flags, s.reasons, c.site, c.text, c.author, c.ts, s.rule,
                         s.campaign, text_digest(c.text), s.action, f"{c.site}:{s.action}" if flags & COUNT_FLAG else ""))
        source = self.source or k.comments
        packed_dead = [(d.stream_id, [x for pair in d.as_fields(source).items() for x in pair]) for d in dead]
        args.append(_dumps(rows))
        args.append(_dumps(packed_dead))
        return keys, args

    def commit(self, client, scored, dead, *, model: str, now: float, consumer: str, partition: int | None = 0,
               pipeline=None):
        """Run the script; returns one code per comment then per dead letter (1 written, 0 duplicate).

        ``partition`` is the partition the batch was read from.  ``None`` means
        a source without partitions (RabbitMQ): the batch is split by the
        partition of each comment id (dead letters go to partition 0's
        dead-letter stream), one script call
        per partition, and the codes come back in the batch's order.

        With ``pipeline`` the call is queued there (EVAL, since a pipeline cannot
        recover from NOSCRIPT) and ``None`` is returned; the caller executes it.
        """
        if not scored and not dead:
            return []
        if partition is None:
            if self.keys.partitions == 1:
                partition = 0
            else:
                return self._commit_split(client, scored, dead, model=model, now=now, consumer=consumer,
                                          pipeline=pipeline)
        keys, args = self.arguments(scored, dead, model=model, now=now, consumer=consumer, partition=partition)
        if pipeline is not None:
            pipeline.eval(COMMIT_LUA, len(keys), *keys, *args)
            return None
        if self._sha is None:
            self._sha = client.script_load(COMMIT_LUA)
        try:
            reply = client.evalsha(self._sha, len(keys), *keys, *args)
        except NoScriptError:  # the server restarted or its script cache was flushed
            self._sha = client.script_load(COMMIT_LUA)
            reply = client.evalsha(self._sha, len(keys), *keys, *args)
        return [int(x) for x in reply]

    def _commit_split(self, client, scored, dead, *, model: str, now: float, consumer: str, pipeline=None):
        # One script call per partition (a call spanning partitions would be CROSSSLOT on a cluster).
        groups: dict[int, tuple[list, list, list, list]] = {}
        for i, s in enumerate(scored):
            g = groups.setdefault(self.keys.partition_of(s.comment.id), ([], [], [], []))
            g[0].append(i)
            g[1].append(s)
        for j, d in enumerate(dead):
            g = groups.setdefault(0, ([], [], [], []))
            g[2].append(j)
            g[3].append(d)
        codes = [DUPLICATE] * (len(scored) + len(dead))
        for p, (scored_at, part_scored, dead_at, part_dead) in sorted(groups.items()):
            reply = self.commit(client, part_scored, part_dead, model=model, now=now, consumer=consumer,
                                partition=p, pipeline=pipeline)
            if reply is None:
                continue
            for i, code in zip(scored_at + [len(scored) + j for j in dead_at], reply):
                codes[i] = code
        return None if pipeline is not None else codes
