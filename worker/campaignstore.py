"""Campaign state behind a port: :class:`CampaignStore`, and its Redis implementation.

The campaign policy (:mod:`worker.campaigns`) decides; this module keeps what
it decides from.  The policy speaks only to :class:`CampaignStore`; the Redis
implementation, :class:`RedisCampaignStore`, is the only code that knows key
names, scripts and round trips.  A batch costs two pipelined round trips:

1. :meth:`CampaignStore.open_batch`: what other workers added to the
   sightings lists since this worker last read them, the first sightings of
   the authors and sites the worker does not know yet (recorded here; a
   first sighting never changes, so a worker remembers them), when the
   detector first ran with this shingling scheme, and the active campaigns;
2. :meth:`CampaignStore.observe_bands`: this batch's first sightings appended
   (RPUSH), and the bands' buckets updated by one script call (one per band
   on a Redis Cluster, where each band has its own hash slot).  The worker
   has already grouped the batch's hits by bucket (a flood's hundred hits on
   one bucket arrive as one count), so a script's work grows with the
   distinct buckets a batch hits, not with its comments.

A campaign start, its members and the monitor's end of idle campaigns add
their own small calls.

Key layout (every name from :meth:`worker.settings.Keys.campaigns`, so the
deployment prefix leads and ACL patterns such as ``~seawall:*`` still match;
``S`` is the shingling scheme's tag, ``b`` a band's index, ``n`` a half-window
slot, ``g`` a generation).  Every key a script touches is given in KEYS (none is
built inside Lua).  On a Redis Cluster each script call touches the keys of one
hash tag only, so it stays on one slot and a batch makes one pipelined call per
slot; a single Redis takes every band of a batch in one call:

* ``campaigns:{S:b<b>}:buckets:<n>``: band ``b``'s buckets in slot ``n``, one
  hash field per band key seen twice within the window: a packed field of its
  figures, ``<key>L`` the campaign it is linked to, ``<key><author>`` the
  authors counted in it (by hash) until there are ``min_authors``;
* ``campaigns:{S:b<b>}:history:<g>``: band ``b``'s history, per band key its
  count and its busiest window over ``baseline_days`` days;
* ``campaigns:{S:s}:sightings:<n>``: list of the band keys first seen in a
  slot, one string per batch (8 bytes a key: hashes of MinHash bands, never
  text);
* ``campaigns:{authors}:<g>``, ``campaigns:{authors}:sites``: each (site,
  author) hash's first sighting (an author not seen for two generations counts
  as new again) and when the detector first saw each site;
* ``campaigns:S:since``: when the detector first ran with this scheme;
* ``campaigns:active``, ``campaigns:size``, ``campaigns:last``,
  ``campaigns:seed``: the active campaigns, their member counts, their last
  member's time and their first member's band keys.  Each is read and written
  by single-key commands (pipelined, never in one transaction), so they may
  live on different slots.

Upgrading from the layout before this one (``campaigns:S:buckets:<n>``,
``campaigns:S:sightings:<n>``, ``campaigns:S:history:<g>``,
``campaigns:authors:<g>``, ``campaigns:sites`` without hash tags): the band
state lives for a window and its history for ``baseline_days``, so the new
names only restart detection history (and every author counts as new once
more, unless the site is still in its warm-up); the old keys expire on their
own.  Workers of both layouts must not serve one deployment together.  The
campaign records (active, size, last, seed) keep their names.

Writes are safe to repeat, as :mod:`worker.policies` requires: a redelivered
comment counts twice in its buckets, which can only bring a campaign forward
by one comment.
"""
from __future__ import annotations

import hashlib
import json
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Protocol, runtime_checkable

import numpy as np
import redis

from worker.events import EVENTS_MAXLEN, add_event
from worker.settings import Keys

# -- the port's values ---------------------------------------------------------------------------


@dataclass(frozen=True)
class Window:
    """Which campaign state a batch at one moment touches.

    ``tag`` names the shingling scheme (workers that shingle differently
    never share buckets), ``slot`` the current half-window slot (the previous
    one is ``slot - 1``), ``history`` the current history generation and
    ``generation`` the current author generation.
    """

    tag: str
    slot: int
    history: int
    generation: int


@dataclass(frozen=True)
class BucketRules:
    """What makes a bucket worth reporting back to the worker (the policy's parameters).

    A bucket is reported when its window count reaches ``min_size``
    (``link_size`` if a known campaign member hit it) and it is bursty: at
    least ``peak_ratio`` times its busiest window and ``burst_ratio`` times
    what its history's average rate predicts for one window.
    """

    min_size: int
    link_size: int
    min_authors: int
    peak_ratio: float
    burst_ratio: float
    window_s: int


#: flags of a bucket's hits in a batch (see :class:`BandHits`)
MEMBER = 1           # a comment the worker knows as a campaign member hit it
FIRST_IN_PREV = 2    # the band key's first sighting was in the previous slot
FIRST_IN_CUR = 4     # ... in this slot, or earlier in this batch


@dataclass
class BandHits:
    """One band's buckets a batch hits, each once, with what the batch adds to it.

    ``keys`` are the distinct band keys (uint64); per key ``counts`` (hits,
    each maybe standing for others a worker left uncounted), ``new`` (of them
    by new authors), ``lean`` (of them scoring spam-ward), ``flags`` (bits
    :data:`MEMBER`, :data:`FIRST_IN_PREV`, :data:`FIRST_IN_CUR`, the last two
    about where the key's first sighting was) and ``authors``: the distinct
    author keys (8 bytes each) that hit it, in order (its first ``min_authors``
    suffice: a bucket short of them has fewer recorded).
    """

    band: int
    keys: np.ndarray
    counts: np.ndarray
    new: np.ndarray
    lean: np.ndarray
    flags: np.ndarray
    authors: list[bytes]


@dataclass
class Opening:
    """What :meth:`CampaignStore.open_batch` found."""

    since: float | None               # when the detector first ran with this scheme (None: not asked)
    active: set[str] | None           # the active campaigns' ids (None: not asked)
    sightings: tuple[list, list]      # entries added to this and the previous slot's lists since the offsets
    first_seen: list[int]             # per author asked: its first sighting (epoch seconds)
    site_since: dict[str, int]        # per site asked: when the detector first saw it


@dataclass
class Observed:
    """What :meth:`CampaignStore.observe_bands` found."""

    place: int | None = None          # where the batch's first sightings went in this slot's list
    linked: dict[int, str] = field(default_factory=dict)   # band key -> campaign, of the batch's linked buckets
    # band key -> (band, window count, authors, new-author hits, spam-ward hits, history count, busiest window)
    buckets: dict[int, tuple] = field(default_factory=dict)


@runtime_checkable
class CampaignStore(Protocol):
    """Where campaign detection keeps its shared state (see the module doc for the Redis layout)."""

    def open_batch(self, window: Window, *, now: float, offsets: tuple[int, int], authors: bytes,
                   sites: Sequence[str], author_ttl: int, since: bool = True, active: bool = True) -> Opening:
        """Read the sightings added since ``offsets``; the first sightings of ``authors`` (8-byte keys) and of
        ``sites``, recording ``now`` for those seen first; if asked, the scheme's start (recording ``now`` if
        it has none) and the active campaigns."""

    def active_campaigns(self) -> set[str]:
        """The active campaigns' ids."""

    def observe_bands(self, window: Window, *, rules: BucketRules, history_s: float, slot_ttl: int,
                      history_ttl: int, firsts: bytes, bands: Sequence[BandHits]) -> Observed:
        """Append the batch's first sightings (8 bytes each) to this slot's list (one entry, whose place
        comes back); update each band's buckets."""

    def link_bucket(self, window: Window, band: int, key: int, campaign: str) -> str:
        """Link a bucket to ``campaign`` unless it is linked already; the campaign it is linked to."""

    def start_campaign(self, campaign: str, data: dict, seeds: Sequence[str], earlier: int, *, now: float,
                       events_maxlen: int = EVENTS_MAXLEN) -> None:
        """Record a new campaign (its start data, first member's band keys, size so far) and announce it."""

    def record_members(self, window: Window, *, links: dict[tuple[int, int], str], sizes: dict[str, int],
                       now: float) -> None:
        """Link ``{(band, key): campaign}`` buckets; add ``sizes`` members to their campaigns, seen ``now``."""

    def load_seeds(self) -> dict[str, set[str]]:
        """Each campaign's first member's band keys (hex)."""

    def end_idle(self, *, now: float, window_s: int, events_maxlen: int = EVENTS_MAXLEN) -> list[dict]:
        """End the campaigns with no new member for ``window_s``; their ``campaign_end`` data."""

    def read_active(self) -> dict[str, dict]:
        """Active campaigns with their start data, current size and last member time."""


# -- the Redis implementation --------------------------------------------------------------------

_LUA_HELPERS = """
local CHUNK = 7000  -- unpack() is bounded by the Lua stack (8000)
local function chunked(cmd, key, list)
  local out = {}
  for s = 1, #list, CHUNK do
    local r = redis.call(cmd, key, unpack(list, s, math.min(s + CHUNK - 1, #list)))
    if type(r) == 'table' then for _, v in ipairs(r) do out[#out + 1] = v end end
  end
  return out
end
local function cut(blob)
  local out = {}
  for f = 1, #blob / 8 do out[f] = string.sub(blob, 8 * f - 7, 8 * f) end
  return out
end
local function numbers(text)
  local out = {}
  for v in string.gmatch(text, '%d+') do out[#out + 1] = tonumber(v) end
  return out
end
"""

# Authors and sites the worker does not know yet.  One HMGET of the authors in this generation's hash (and one in
# the previous generation's for those missing); new ones are written with the current time, ones found only in the
# previous generation are carried over with their first sighting.  Sites: the same with one hash.
# KEYS: authors (this generation), authors (previous generation), sites.
# ARGV: 1 now, 2 author TTL, 3 author keys (8 bytes each), 4... sites.
# Reply: {the authors' first sightings, the sites' first sightings} (space-separated epoch seconds).
_AUTHORS_SCRIPT = _LUA_HELPERS + """
local now_s = math.floor(tonumber(ARGV[1]))
local authors = cut(ARGV[3])
local first = {}
if #authors > 0 then first = chunked('HMGET', KEYS[1], authors) end
local missing, fields = {}, {}
for i = 1, #authors do
  if not first[i] then missing[#missing + 1] = i; fields[#fields + 1] = authors[i] end
end
if #missing > 0 then
  local old = chunked('HMGET', KEYS[2], fields)
  local pairs_ = {}
  for k, i in ipairs(missing) do
    first[i] = old[k] or now_s
    pairs_[#pairs_ + 1] = authors[i]
    pairs_[#pairs_ + 1] = first[i]
  end
  chunked('HSET', KEYS[1], pairs_)
  redis.call('EXPIRE', KEYS[1], tonumber(ARGV[2]))
end
local sites = {}
for s = 4, #ARGV do sites[#sites + 1] = ARGV[s] end
local since = {}
if #sites > 0 then
  since = redis.call('HMGET', KEYS[3], unpack(sites))
  for s = 1, #sites do
    if not since[s] then redis.call('HSETNX', KEYS[3], sites[s], now_s); since[s] = now_s end
  end
end
return {table.concat(first, ' '), table.concat(since, ' ')}
"""

# One band's buckets, each once per batch with what the batch adds to it (the worker grouped the hits).
# A bucket is one field of the current slot's hash, named by its key, holding "t p e m a w x h y c": the
# window's count t (the previous slot's own count p carried in, plus this slot's), the baseline (e: the history's
# count, m: its busiest window), distinct authors a (each recorded in a field <key><author key>) until there are
# min_authors, hits by new authors w and spam-ward hits h (carried in like the count: x and y), and c = 1 once a
# comment the worker knows as a campaign member hit it.  <key>L is the campaign the bucket is linked to.  A key
# with no bucket in this slot yet carries in the previous slot's own figures and reads its baseline from the two
# history generations ("count busiest-window" per key); then the previous slot joins the current generation: its
# own count always, its window as the busiest one unless the bucket was linked to a campaign or hit by one's
# members.  The key's first sighting (not a hit) counts too: in the previous slot (when there was no bucket
# there) or in this one (or earlier in the batch).
# One call updates one or more bands: one on a Redis Cluster (each band has its own hash tag), every band of the
# batch on a single Redis (one script call per batch instead of one per band).
# KEYS: per band, buckets (this slot), buckets (previous slot), history (this generation), history (previous
#       generation).
# ARGV: 1 slot TTL, 2 history TTL, 3 min_size, 4 link_size, 5 min_authors, 6 peak_ratio, 7 burst_ratio,
#       8 window_s, 9 history_s (the time the history covers); then per band: the band keys (8 bytes each), per
#       key 15 bytes (big-endian): hits, new-author hits, spam-ward hits (4 bytes each), flags (1: a known member,
#       2 first seen in the previous slot, 4 first seen in this one; 1 byte), authors (2 bytes), and the keys'
#       authors in turn (8 bytes each).
# Reply: per band {{key, campaign, ...} of linked buckets, then per bucket that reaches min_size (link_size if a
#         known member hit it) and is bursty: {key, window count, authors, new-author hits, spam-ward hits, history
#         count, busiest window}}.
_BAND_SCRIPT = _LUA_HELPERS + """
local function figures(blob)  -- per bucket: hits, new-author hits, spam-ward hits, flags, authors
  local out, n = {}, 0
  for o = 0, #blob - 15, 15 do
    local a1, a2, a3, a4, b1, b2, b3, b4, c1, c2, c3, c4, f, d1, d2 = string.byte(blob, o + 1, o + 15)
    out[n + 1] = ((a1 * 256 + a2) * 256 + a3) * 256 + a4
    out[n + 2] = ((b1 * 256 + b2) * 256 + b3) * 256 + b4
    out[n + 3] = ((c1 * 256 + c2) * 256 + c3) * 256 + c4
    out[n + 4], out[n + 5] = f, d1 * 256 + d2
    n = n + 5
  end
  return out
end
local min_size, link_size, min_authors = tonumber(ARGV[3]), tonumber(ARGV[4]), tonumber(ARGV[5])
local peak_ratio, burst_ratio = tonumber(ARGV[6]), tonumber(ARGV[7])
local window, history_s = tonumber(ARGV[8]), tonumber(ARGV[9])
local PACKED = '^(%d+) (%d+) (%d+) (%d+) (%d+) (%d+) (%d+) (%d+) (%d+) (%d+)$'
local function read(key, list)  -- each bucket's packed figures and link
  local names = {}
  for _, k in ipairs(list) do names[#names + 1] = k; names[#names + 1] = k .. 'L' end
  return chunked('HMGET', key, names)
end
local function history(v)  -- a history field: "sum peak"
  if not v then return 0, 0 end
  local sum, peak = string.match(v, '^(%d+) (%d+)$')
  return tonumber(sum), tonumber(peak)
end

local function band(B, P, H, G, key_blob, figure_blob, author_blob)
  local keys, fig, alist = cut(key_blob), figures(figure_blob), cut(author_blob)
  local state, opened, opened_keys = {}, {}, {}
  local got = read(B, keys)
  for n, k in ipairs(keys) do
    local s, v = {}, got[2 * n - 1]
    state[n] = s
    if v then
      local f = {string.match(v, PACKED)}
      s.t, s.p, s.e, s.m, s.a = tonumber(f[1]), tonumber(f[2]), tonumber(f[3]), tonumber(f[4]), tonumber(f[5])
      s.w, s.x, s.h, s.y = tonumber(f[6]), tonumber(f[7]), tonumber(f[8]), tonumber(f[9])
      s.c = f[10] == '1'
      s.L = got[2 * n]
    else
      opened[#opened + 1] = n
      opened_keys[#opened_keys + 1] = k
    end
  end
  if #opened > 0 then  -- first hits in this slot: carry the previous slot in, read the baseline, fold
    local pv = read(P, opened_keys)
    local hv = chunked('HMGET', H, opened_keys)
    local gv = chunked('HMGET', G, opened_keys)
    local fold = {}
    for j, n in ipairs(opened) do
      local s, v, k = state[n], pv[2 * j - 1], keys[n]
      local hs, hp = history(hv[j])
      local gs, gp = history(gv[j])
      local flags = fig[5 * n - 1]
      s.a, s.L, s.c, s.new = 0, false, false, true
      s.e, s.m = hs + gs, math.max(hp, gp)
      s.t, s.w, s.h = 0, 0, 0
      if v then
        local f = {string.match(v, PACKED)}
        local win = tonumber(f[1])
        s.t = win - tonumber(f[2])
        s.w, s.h = tonumber(f[6]) - tonumber(f[7]), tonumber(f[8]) - tonumber(f[9])
        -- the previous slot's own count joins the sum; its window joins the peak unless it was a campaign's
        fold[#fold + 1] = k
        local campaign_window = pv[2 * j] or f[10] == '1'
        fold[#fold + 1] = (hs + s.t) .. ' ' .. (campaign_window and hp or math.max(hp, win))
      elseif flags % 4 >= 2 then
        s.t = 1  -- a first sighting last slot
      end
      s.p, s.x, s.y = s.t, s.w, s.h
      if flags >= 4 then s.t = s.t + 1 end  -- a first sighting earlier in this slot
    end
    if #fold > 0 then
      chunked('HSET', H, fold)
      redis.call('EXPIRE', H, tonumber(ARGV[2]))
    end
  end

  -- authors: which (bucket, author) pairs are recorded already, for buckets short of min_authors (a bucket new
  -- in this slot has none: its authors are written with its figures)
  local anames, at = {}, 0
  local first_author = {}
  for n = 1, #keys do
    first_author[n] = at
    local count = fig[5 * n]
    if state[n].a < min_authors and not state[n].new then
      for q = at + 1, at + count do anames[#anames + 1] = keys[n] .. alist[q] end
    end
    at = at + count
  end
  local recorded = {}
  if #anames > 0 then
    local v = chunked('HMGET', B, anames)
    for q, nm in ipairs(anames) do recorded[nm] = v[q] and true or false end
  end

  local out = {{}}
  local writes = {}
  for n, k in ipairs(keys) do
    local s = state[n]
    local flags = fig[5 * n - 1]
    s.t, s.w, s.h = s.t + fig[5 * n - 4], s.w + fig[5 * n - 3], s.h + fig[5 * n - 2]
    local member = flags % 2 == 1
    if member then s.c = true end
    local q = first_author[n]
    while s.a < min_authors and q < first_author[n] + fig[5 * n] do
      q = q + 1
      local nm = k .. alist[q]
      if not recorded[nm] then
        recorded[nm] = true
        s.a = s.a + 1
        writes[#writes + 1] = nm
        writes[#writes + 1] = 1
      end
    end
    if s.L then
      table.insert(out[1], k)
      table.insert(out[1], s.L)
    elseif s.t >= (member and link_size or min_size) and s.t >= peak_ratio * s.m
        and s.t * history_s >= burst_ratio * s.e * window then
      out[#out + 1] = {k, s.t, s.a, s.w, s.h, s.e, s.m}
    end
    writes[#writes + 1] = k
    writes[#writes + 1] = string.format('%d %d %d %d %d %d %d %d %d %d', s.t, s.p, s.e, s.m, s.a, s.w, s.x, s.h, s.y,
                                        s.c and 1 or 0)
  end
  chunked('HSET', B, writes)
  redis.call('EXPIRE', B, tonumber(ARGV[1]))
  return out
end
local replies = {}
for b = 1, #KEYS / 4 do
  replies[b] = band(KEYS[4 * b - 3], KEYS[4 * b - 2], KEYS[4 * b - 1], KEYS[4 * b],
                    ARGV[7 + 3 * b], ARGV[8 + 3 * b], ARGV[9 + 3 * b])
end
return replies
"""


# a bucket's figures as the band script reads them (15 bytes, big-endian, packed)
_FIGURES = np.dtype([("hits", ">u4"), ("new", ">u4"), ("lean", ">u4"), ("flags", "u1"), ("authors", ">u2")])


def _sha(body: str) -> str:
    return hashlib.sha1(body.encode()).hexdigest()


def campaign_keys(keys: Keys) -> dict[str, str]:
    """The campaign records every process reads (active campaigns, sizes, last members, seeds)."""
    return {"active": keys.campaigns("active"), "last": keys.campaigns("last"),
            "size": keys.campaigns("size"), "seed": keys.campaigns("seed")}


class CampaignKeys:
    """Every campaign key name of one deployment (see the module doc's layout)."""

    def __init__(self, keys: Keys):
        self.keys = keys
        self.records = campaign_keys(keys)

    def band(self, window: Window, band: int) -> list[str]:
        """The band script's KEYS: buckets (this, previous slot), history (this, previous generation)."""
        k, tag = self.keys.campaigns, "{%s:b%d}" % (window.tag, band)
        return [k(tag, "buckets", str(window.slot)), k(tag, "buckets", str(window.slot - 1)),
                k(tag, "history", str(window.history)), k(tag, "history", str(window.history - 1))]

    def sightings(self, window: Window) -> list[str]:
        """The sightings lists of this and the previous slot."""
        k, tag = self.keys.campaigns, "{%s:s}" % window.tag
        return [k(tag, "sightings", str(window.slot)), k(tag, "sightings", str(window.slot - 1))]

    def authors(self, window: Window) -> list[str]:
        """The authors script's KEYS: authors (this, previous generation), sites."""
        k = self.keys.campaigns
        return [k("{authors}", str(window.generation)), k("{authors}", str(window.generation - 1)),
                k("{authors}", "sites")]

    def since(self, window: Window) -> str:
        return self.keys.campaigns(window.tag, "since")


class RedisCampaignStore:
    """:class:`CampaignStore` on Redis (or a Redis Cluster: every script call stays on one slot).

    Parameters
    ----------
    client : a redis-py client.
    keys : the deployment's key names.
    cluster : whether ``client`` talks to a Redis Cluster, where each band's buckets are updated by a call of
        their own (their hash tag's slot); a single Redis updates every band in one call.  Default: whether
        ``client`` is redis-py's cluster client.
    """

    def __init__(self, client, keys: Keys, *, cluster: bool | None = None):
        self.client = client
        self.keys = keys
        self.cluster = isinstance(client, redis.cluster.RedisCluster) if cluster is None else cluster
        self.names = CampaignKeys(keys)
        self._authors = _sha(_AUTHORS_SCRIPT)
        self._band = _sha(_BAND_SCRIPT)
        self._loaded = False

    def _call(self, pipe, script: str, keys: list[str], args: list) -> None:
        """Queue one script call (EVALSHA of ``script``) on ``pipe``; every key it touches is in ``keys``."""
        pipe.evalsha(script, len(keys), *keys, *args)

    def _execute(self, build) -> list:
        """Run the pipeline ``build()`` queues, loading the scripts first (SCRIPT LOAD: the commands an ACL
        user needs stay EVALSHA and SCRIPT LOAD) and again if the server lost them (a restart).  A
        pipeline whose scripts were missing ran none of them, so running it again writes nothing twice."""
        if not self._loaded:
            self._load()
        try:
            return build().execute()
        except redis.exceptions.NoScriptError:
            self._load()
            return build().execute()

    def _load(self) -> None:
        for body in (_AUTHORS_SCRIPT, _BAND_SCRIPT):
            self.client.script_load(body)
        self._loaded = True

    # -- the batch -------------------------------------------------------------------------

    def open_batch(self, window: Window, *, now: float, offsets: tuple[int, int], authors: bytes,
                   sites: Sequence[str], author_ttl: int, since: bool = True, active: bool = True) -> Opening:
        cur, prev = self.names.sightings(window)
        since_key = self.names.since(window)
        asked = bool(authors) or bool(sites)

        def build():
            pipe = self.client.pipeline(transaction=False)
            pipe.lrange(cur, offsets[0], -1)
            pipe.lrange(prev, offsets[1], -1)
            if since:
                pipe.set(since_key, int(now), nx=True)
                pipe.get(since_key)
            if active:
                pipe.hkeys(self.names.records["active"])
            if asked:
                self._call(pipe, self._authors, self.names.authors(window),
                           [f"{now:.3f}", author_ttl, authors, *sites])
            return pipe

        replies = self._execute(build)
        out = Opening(since=None, active=None, sightings=(replies[0], replies[1]), first_seen=[], site_since={})
        at = 2
        if since:
            out.since = float(replies[at + 1]) if replies[at + 1] is not None else now
            at += 2
        if active:
            out.active = {_text(a) for a in replies[at]}
            at += 1
        if asked:
            out.first_seen = [int(v) for v in replies[at][0].split()]
            out.site_since = dict(zip(sites, (int(v) for v in replies[at][1].split())))
        return out

    def active_campaigns(self) -> set[str]:
        return {_text(a) for a in self.client.hkeys(self.names.records["active"])}

    def observe_bands(self, window: Window, *, rules: BucketRules, history_s: float, slot_ttl: int,
                      history_ttl: int, firsts: bytes, bands: Sequence[BandHits]) -> Observed:
        cur = self.names.sightings(window)[0]
        common = [slot_ttl, history_ttl, rules.min_size, rules.link_size, rules.min_authors, rules.peak_ratio,
                  rules.burst_ratio, rules.window_s, f"{history_s:.3f}"]
        per_band = []  # (band, KEYS, per-band ARGV) of each band the batch hits
        for hits in bands:
            if not hits.keys.size:
                continue
            figures = np.empty(hits.keys.size, dtype=_FIGURES)
            figures["hits"], figures["new"], figures["lean"] = hits.counts, hits.new, hits.lean
            figures["flags"] = hits.flags
            figures["authors"] = [len(a) // 8 for a in hits.authors]
            per_band.append((hits.band, self.names.band(window, hits.band),
                             [hits.keys.astype(">u8").tobytes(), figures.tobytes(), b"".join(hits.authors)]))
        # one call per band's hash tag on a cluster; one call for every band on a single Redis
        groups = [[b] for b in per_band] if self.cluster else ([per_band] if per_band else [])
        calls = [([band for band, _k, _a in group], [k for _b, keys, _a in group for k in keys],
                  common + [a for _b, _k, args in group for a in args]) for group in groups]

        def build():
            pipe = self.client.pipeline(transaction=False)
            if firsts:
                pipe.rpush(cur, firsts)
                pipe.expire(cur, slot_ttl)
            for _bands, keys, args in calls:
                self._call(pipe, self._band, keys, args)
            return pipe

        replies = self._execute(build)
        out = Observed()
        if firsts:
            out.place = int(replies[0]) - 1
            replies = replies[2:]
        for (call_bands, _keys, _args), call_reply in zip(calls, replies):
            for band, reply in zip(call_bands, call_reply):
                linked = reply[0]
                for key, campaign in zip(linked[::2], linked[1::2]):
                    out.linked[int.from_bytes(key, "big")] = _text(campaign)
                for key, t, a, w, h, e, m in reply[1:]:
                    out.buckets[int.from_bytes(key, "big")] = (band, int(t), int(a), int(w), int(h), int(e), int(m))
        return out

    # -- campaigns -------------------------------------------------------------------------

    def link_bucket(self, window: Window, band: int, key: int, campaign: str) -> str:
        buckets = self.names.band(window, band)[0]
        field_ = key.to_bytes(8, "big") + b"L"
        if self.client.hsetnx(buckets, field_, campaign):
            return campaign
        other = self.client.hget(buckets, field_)  # another worker linked it first
        return _text(other) if other is not None else campaign

    def start_campaign(self, campaign: str, data: dict, seeds: Sequence[str], earlier: int, *, now: float,
                       events_maxlen: int = EVENTS_MAXLEN) -> None:
        # Single-key writes, pipelined (no transaction: the records may live on different cluster slots).  The
        # link on the campaign's bucket already decided that this worker announces it.
        ck = self.names.records
        pipe = self.client.pipeline(transaction=False)
        pipe.hset(ck["seed"], campaign, json.dumps(list(seeds)))
        pipe.hset(ck["size"], campaign, earlier)
        pipe.hset(ck["last"], campaign, f"{now:.3f}")
        pipe.hset(ck["active"], campaign, json.dumps(data, sort_keys=True))
        add_event(self.client, self.keys.events, "campaign_start", data, ts=now, maxlen=events_maxlen, pipeline=pipe)
        pipe.execute()

    def record_members(self, window: Window, *, links: dict[tuple[int, int], str], sizes: dict[str, int],
                       now: float) -> None:
        ck = self.names.records
        pipe = self.client.pipeline(transaction=False)
        by_band: dict[int, dict] = {}
        for (band, key), campaign in links.items():
            by_band.setdefault(band, {})[key.to_bytes(8, "big") + b"L"] = campaign
        for band, mapping in by_band.items():
            pipe.hset(self.names.band(window, band)[0], mapping=mapping)
        for campaign, count in sizes.items():
            pipe.hincrby(ck["size"], campaign, count)
            pipe.hset(ck["last"], campaign, f"{now:.3f}")
        pipe.execute()

    def load_seeds(self) -> dict[str, set[str]]:
        out = {}
        for k, v in self.client.hgetall(self.names.records["seed"]).items():
            try:
                out[_text(k)] = set(json.loads(v))
            except (ValueError, TypeError):
                continue
        return out

    def end_idle(self, *, now: float, window_s: int, events_maxlen: int = EVENTS_MAXLEN) -> list[dict]:
        return end_idle_campaigns(self.client, self.keys, now=now, window_s=window_s, events_maxlen=events_maxlen)

    def read_active(self) -> dict[str, dict]:
        return read_campaigns(self.client, self.keys)


def end_idle_campaigns(client, keys: Keys, *, now: float, window_s: int,
                       events_maxlen: int = EVENTS_MAXLEN) -> list[dict]:
    """End the campaigns with no new member for ``window_s``; returns their ``campaign_end`` data.

    Safe to run from every process: the HDEL that removes a campaign decides
    which process announces its end.
    """
    ck = campaign_keys(keys)
    last = {_text(k): float(v) for k, v in client.hgetall(ck["last"]).items()}
    ended = []
    for campaign, seen in last.items():
        if now - seen < window_s:
            continue
        raw = client.hget(ck["active"], campaign)
        size = client.hget(ck["size"], campaign)
        if not client.hdel(ck["active"], campaign):
            client.hdel(ck["last"], campaign)
            continue
        start = json.loads(raw) if raw else {}
        data = {"id": campaign, "site": start.get("site", ""), "members": int(size or 0),
                "started": start.get("started"), "last_seen": round(seen, 3)}
        pipe = client.pipeline(transaction=False)  # single-key writes: the records may live on different slots
        pipe.hdel(ck["last"], campaign)
        pipe.hdel(ck["size"], campaign)
        pipe.hdel(ck["seed"], campaign)
        add_event(client, keys.events, "campaign_end", data, ts=now, maxlen=events_maxlen, pipeline=pipe)
        pipe.execute()
        ended.append(data)
    return ended


def read_campaigns(client, keys: Keys) -> dict[str, dict]:
    """Active campaigns with their start data, current size and last member time."""
    ck = campaign_keys(keys)
    pipe = client.pipeline(transaction=False)
    pipe.hgetall(ck["active"])
    pipe.hgetall(ck["size"])
    pipe.hgetall(ck["last"])
    active, sizes, last = pipe.execute()
    out = {}
    for k, v in active.items():
        cid = _text(k)
        try:
            data = json.loads(v)
        except ValueError:
            data = {}
        data["members"] = int(sizes.get(k, data.get("members", 0)) or 0)
        if k in last:
            data["last_seen"] = float(last[k])
        out[cid] = data
    return out


def _text(value) -> str:
    return value.decode("utf-8", "replace") if isinstance(value, bytes) else str(value)
