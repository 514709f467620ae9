"""Campaign detection in the comment path, shared by all workers through Redis.

A *campaign* is a family of near-duplicate comments that is new and bursty
against the site's own history and carries a second sign of coordination.
For each batch, :class:`CampaignPolicy`:

1. cuts every comment into the model's normalized tokens with one fixed
   tokenizer configuration (:data:`CAMPAIGN_TOKENIZER`: NFKC, look-alike
   letters, zero-width characters, leetspeak, spaced letters, link markers),
   whatever model the worker serves, so that spelling tricks cannot split a
   family and every worker computes the same shingles;
2. computes their MinHash signatures and LSH band keys (:mod:`model.minhash`);
   a band key names a *bucket*, a family of comments that agree on that band;
3. finds which band keys were seen before in the window in its own copy of
   the recent sightings (:class:`Sightings`), then sends the batch to Redis
   in one script call, which records each author's first sighting, appends
   the batch's first sightings to the current slot's list (returning what
   other workers appended since), and counts the buckets hit;
4. decides in the worker, from the buckets the script returns, which comments
   are campaign members.

A bucket starts a campaign when, within the window (the current and the
previous half-window slot),

* it is **dense**: at least ``min_size`` comments from ``min_authors`` authors;
* it is **bursty against its history**: its count is at least ``burst_ratio``
  times what its history's average rate predicts for one window, and
  ``peak_ratio`` times the busiest window in its history.  Each slot's count
  joins the history (two generations of ``baseline_days`` days) when the next
  slot first sees the band key; a window that belonged to a campaign does not
  raise the busiest window.  A phrasing family that members post every day,
  even at one busy hour, has a history that predicts it;
* and it has **a second signal**: its authors are new to the site (at least
  ``new_author_share`` of its comments are by authors first seen on their site
  less than ``new_author_s`` ago; in the first ``warmup_s`` after the detector
  first sees a site nobody is new, as it is learning the regulars), and/or its
  comments' scores lean spam-ward (at least ``lean_share`` of them above the
  site's ``lean_quantile`` of recent scores, a baseline each worker keeps for
  itself).  ``signals`` says which is required.

Comments of the batch in a bucket linked to an active campaign are its
members.  A member's other buckets are linked too when they are bursty and
carry the second signal themselves (from ``link_size`` comments), and a
qualifying bucket that shares a band key with an active campaign's first
member joins that campaign, so the campaign follows the template's variations
and a burst is announced once.  With ``hold=True`` members that routing would
publish are held for review.  A campaign that goes on at the same rate
becomes part of its own history and stops being bursty after about a fifth of
the history's length: the nightly retrain has learnt it by then.

Redis keys (all named by :class:`worker.settings.Keys`, all passed to the
script in KEYS; the band state is under a tag of the shingling scheme, so
workers that shingle differently never mix their buckets):

* ``campaigns:{tag}:sightings:{slot}``: list of the band keys first seen in
  a slot, one string per batch (8 bytes a key, hashes of MinHash bands, never
  text).  Seawall before this layout kept a set, ``campaigns:{tag}:seen:{slot}``:
  it is ignored (and expires within a window), so workers of both layouts must
  not serve one deployment together; buckets and history keep their layout;
* ``campaigns:{tag}:buckets:{slot}``: one hash per slot; per band key seen
  twice within the window a packed field of its figures, the campaign it is
  linked to and the authors (by hash) counted in it;
* ``campaigns:{tag}:history:{generation}``: per band key, its count and its
  busiest window over ``baseline_days`` days;
* ``campaigns:{tag}:since``: when the detector first ran with this scheme;
* ``campaigns:authors:{generation}``: each (site, author) hash's first
  sighting; an author not seen for two generations counts as new again;
* ``campaigns:sites``: when the detector first saw each site;
* ``campaigns:active``, ``campaigns:size``, ``campaigns:last``,
  ``campaigns:seed``: the active campaigns, their member counts, their last
  member's time and their first member's band keys.

Writes are safe to repeat, as :mod:`worker.policies` requires: a redelivered
comment counts twice in its buckets, which can only bring a campaign forward
by one comment.  :func:`end_idle_campaigns` ends campaigns with no new member
for ``window_s`` (``campaign_end``).
"""
from __future__ import annotations

import hashlib
import json
import logging
import time
from collections import Counter
from collections.abc import Callable, Sequence

import numpy as np

from model.actions import Action
from model.minhash import MinHasher, band_hashes
from model.params import flag, integer, one_of, real, set_params
from model.tokens import Tokenizer
from worker.events import EVENTS_MAXLEN, add_event
from worker.routing import CAMPAIGN_RULE, Decision
from worker.settings import Keys

log = logging.getLogger("seawall.worker.campaigns")

#: The one tokenizer configuration campaigns shingle with, whatever model a
#: worker serves: unigrams and markers after every evasion-undoing step.  A
#: change here (or in the normalization rules, which ``version`` pins) gives
#: the band state a new tag, so no two rules ever meet in one bucket.
CAMPAIGN_TOKENIZER = {"version": 1, "bigrams": False, "char_ngrams": (0, 0), "homoglyphs": True, "accents": True,
                      "leet": True, "join_spaced": True, "squash_repeats": True}

DAY_S = 86_400
_KNOWN_SAMPLE = 4  # a flood's hits of a bucket a worker knows linked: one in this many is counted
_MAX_LEARNT_LINKS = 10_000  # linked buckets a worker remembers (a campaign links a few per template variant)
SIGNALS = ("either", "authors", "lean", "both")

# One call per batch.  Every key it touches comes in KEYS, named by the worker.
#
# Authors: one HMGET of the batch's author keys in this generation's hash (and one in the previous
# generation's for those missing); new ones are written with the current time, ones found only in the
# previous generation are carried over with their first sighting.  Sites: the same with one hash.  An
# author is new when first seen less than new_author_s ago and after the site's warm-up (the first
# warmup_s after the detector first saw the site, while everyone it sees is a first sighting).
#
# Band keys: most are seen once, and a first sighting only joins the slot's list (one RPUSH of one string for
# the whole batch; the worker tests membership in its own copy).  A key already seen in either slot (or earlier
# in the batch) is a *hit* on its bucket (unless the worker knows the key linked and leaves it out); only hits
# are sent.  A bucket is one field of the current slot's hash,
# named by its key, holding "t p e m a w x h y c": the window's count t (the previous slot's own count p carried
# in, plus this slot's), the baseline (e: the history's count, m: its busiest window), distinct authors a (each
# recorded in a field <key><author key>) until there are min_authors, hits by new authors w and spam-ward hits h
# (carried in like the count: x and y), and c = 1 once a comment the worker knows as a campaign member hit it.
# <key>L is the campaign the bucket is linked to (the worker writes it).  The batch's buckets are read in one
# HMGET, updated in Lua and written back in one HSET.  A key with no bucket in this slot yet carries in the
# previous slot's own figures and reads its baseline from the two history generations ("count busiest-window"
# per key); then the previous slot joins the current generation: its own count always, its window as the busiest
# one unless the bucket was linked to a campaign or hit by one's members.  The reply names each bucket the batch
# hit once, as it stands after the batch: a linked one with its campaign, another one if its window count
# reaches min_size (link_size if a row the worker knows as a member hit it) and it is bursty (far above both its
# history's average and its busiest window) as {key, window count, authors, new-author hits, spam-ward hits,
# history count, busiest window}; the worker decides the rest.
#
# KEYS: sightings (this slot), sightings (previous slot), buckets (this slot), buckets (previous slot),
#       authors (this generation), authors (previous generation), sites, scheme start,
#       history (this generation), history (previous generation), active campaigns.
# ARGV: 1 now, 2 min_size, 3 bands, 4 slot TTL, 5 author TTL, 6 history TTL, 7 new_author_s,
#       8 min_authors, 9 the hits' band keys (8 bytes each), 10 author keys (8 bytes, one per
#       comment), 11 each row's comment (0-based), 12 each comment's site (1-based), 13 a byte per hit
#       (1: the key occurs earlier in the batch, +2: seen in this slot, +4: seen in the previous slot),
#       14 a byte per row (1: spam-ward, +2: a known member), 15 link_size, 16 warmup_s, 17 window_s,
#       18 burst_ratio, 19 peak_ratio, 20 start of the previous history generation, 21 "row hits" pairs per
#       hit: its row (0-based) and the hits it stands for (more than 1 for the ones left out), 22 "1" if the
#       worker knows members in the batch, 23 the batch's first sightings in this slot (8 bytes each),
#       24 and 25 the worker's offsets into the two sightings lists, 26... the batch's sites.
# Reply: {scheme start, active campaigns (when anything below or a known member needs them),
#         {key, campaign, key, campaign, ...}, sightings added to this slot's list since the offset (before
#         this batch's), the same for the previous slot's, bucket, bucket, ...}.
_STATE_SCRIPT = """
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

local now = tonumber(ARGV[1])
local now_s = math.floor(now)
local min_size, bands, min_authors = tonumber(ARGV[2]), tonumber(ARGV[3]), tonumber(ARGV[8])

local authors = cut(ARGV[10])
local first = {}
if #authors > 0 then
  first = chunked('HMGET', KEYS[5], authors)
  local missing, fields = {}, {}
  for i = 1, #authors do
    if not first[i] then missing[#missing + 1] = i; fields[#fields + 1] = authors[i] end
  end
  if #missing > 0 then
    local old = chunked('HMGET', KEYS[6], fields)
    local pairs_ = {}
    for k, i in ipairs(missing) do
      first[i] = old[k] or now_s
      pairs_[#pairs_ + 1] = authors[i]
      pairs_[#pairs_ + 1] = first[i]
    end
    chunked('HSET', KEYS[5], pairs_)
    redis.call('EXPIRE', KEYS[5], tonumber(ARGV[5]))
  end
end
local newer_than = {}  -- per site: an author first seen at or after this is new
local sites = {}
for s = 26, #ARGV do sites[#sites + 1] = ARGV[s] end
if #sites > 0 then
  local since = redis.call('HMGET', KEYS[7], unpack(sites))
  for s = 1, #sites do
    local t = tonumber(since[s])
    if not t then redis.call('HSETNX', KEYS[7], sites[s], now_s); t = now_s end
    newer_than[s] = math.max(now - tonumber(ARGV[7]), t + tonumber(ARGV[16]))
  end
end
local site_of = numbers(ARGV[12])
redis.call('SET', KEYS[8], now_s, 'NX')
local since = redis.call('GET', KEYS[8])
local out = {since, {}, {}, {}, {}}
local function finish()  -- the active campaigns come along whenever the worker will need them
  if #out > 5 or #out[3] > 0 or ARGV[22] == '1' then out[2] = redis.call('HKEYS', KEYS[11]) end
  return out
end

-- sightings: what other workers added to the two slots' lists since this worker last read them, then the
-- batch's first sightings in this slot (one string), so the worker's copy stays whole
out[4] = redis.call('LRANGE', KEYS[1], tonumber(ARGV[24]), -1)
out[5] = redis.call('LRANGE', KEYS[2], tonumber(ARGV[25]), -1)
if #ARGV[23] > 0 then
  redis.call('RPUSH', KEYS[1], ARGV[23])
  redis.call('EXPIRE', KEYS[1], tonumber(ARGV[4]))
end
local fields = cut(ARGV[9])  -- the batch's hits only: the worker found them in its copy of the sightings
if #fields == 0 then return finish() end
local row_comment = numbers(ARGV[11])
-- one byte per hit: 1 the key occurs earlier in the batch, 2 it was seen in this slot, 4 in the previous slot;
-- one byte per row: 1 the score leans spam-ward, 2 the worker knows the comment as a campaign member
local hit_flags, row_flags = ARGV[13], ARGV[14]
local function repeated(f) return string.byte(hit_flags, f) % 2 == 1 end
local function in_cur(f) return math.floor(string.byte(hit_flags, f) / 2) % 2 == 1 end
local function in_prev(f) return string.byte(hit_flags, f) >= 4 end
local function lean(r) return string.byte(row_flags, r + 1) % 2 == 1 end
local function member(r) return string.byte(row_flags, r + 1) >= 2 end
local hit_row, weight = {}, {}  -- each hit's row, and the hits it stands for (a known link's others left out)
do
  local rw = numbers(ARGV[21])
  for f = 1, #fields do hit_row[f] = rw[2 * f - 1]; weight[f] = rw[2 * f] end
end
local link_size = tonumber(ARGV[15])
local B, P, H, G = KEYS[3], KEYS[4], KEYS[9], KEYS[10]
-- the bursty test's first half (the worker checks it again): far above the history's average and peak
local window, burst_ratio, peak_ratio = tonumber(ARGV[17]), tonumber(ARGV[18]), tonumber(ARGV[19])
local history_s = math.max(now - math.max(tonumber(since), tonumber(ARGV[20])) - window, window)

-- the batch's hits and their distinct buckets
local hits, order, state = {}, {}, {}
for f = 1, #fields do
  hits[f] = f
  local k = fields[f]
  if not state[k] then state[k] = {}; order[#order + 1] = k end
end
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
local got = read(B, order)
local opened = {}
for n, k in ipairs(order) do
  local s, v = state[k], got[2 * n - 1]
  if v then
    local f = {string.match(v, PACKED)}
    s.t, s.p, s.e, s.m, s.a = tonumber(f[1]), tonumber(f[2]), tonumber(f[3]), tonumber(f[4]), tonumber(f[5])
    s.w, s.x, s.h, s.y = tonumber(f[6]), tonumber(f[7]), tonumber(f[8]), tonumber(f[9])
    s.c = f[10] == '1'
    s.L = got[2 * n]
  else
    opened[#opened + 1] = k
  end
end
if #opened > 0 then  -- first hits in this slot: carry the previous slot in, read the baseline, fold
  local pv = read(P, opened)
  local hv = chunked('HMGET', H, opened)
  local gv = chunked('HMGET', G, opened)
  local fold = {}
  for n, k in ipairs(opened) do
    local s, v = state[k], pv[2 * n - 1]
    local hs, hp = history(hv[n])
    local gs, gp = history(gv[n])
    s.opened, s.a, s.L = true, 0, false
    s.e, s.m = hs + gs, math.max(hp, gp)
    s.t, s.w, s.h = 0, 0, 0
    if v then
      local f = {string.match(v, PACKED)}
      local window = tonumber(f[1])
      s.t = window - tonumber(f[2])
      s.w, s.h = tonumber(f[6]) - tonumber(f[7]), tonumber(f[8]) - tonumber(f[9])
      s.prev_bucket = true
      -- the previous slot's own count joins the sum; its window joins the peak unless it was a campaign's
      fold[#fold + 1] = k
      local campaign_window = pv[2 * n] or f[10] == '1'
      fold[#fold + 1] = (hs + s.t) .. ' ' .. (campaign_window and hp or math.max(hp, window))
    end
    s.p, s.x, s.y = s.t, s.w, s.h
  end
  if #fold > 0 then
    chunked('HSET', H, fold)
    redis.call('EXPIRE', H, tonumber(ARGV[6]))
  end
end

-- authors: which (bucket, author) pairs are recorded already, for buckets short of min_authors
local anames, named = {}, {}
for _, f in ipairs(hits) do
  local k = fields[f]
  if state[k].a < min_authors then
    local nm = k .. authors[row_comment[hit_row[f] + 1] + 1]
    if not named[nm] then named[nm] = true; anames[#anames + 1] = nm end
  end
end
local recorded = {}
if #anames > 0 then
  local v = chunked('HMGET', B, anames)
  for n, nm in ipairs(anames) do recorded[nm] = v[n] and true or false end
end

local fresh_of = {}
local writes = {}
for _, f in ipairs(hits) do
  local r = hit_row[f]
  local k = fields[f]
  local s = state[k]
  local i = row_comment[r + 1] + 1
  if s.opened and not s.started then
    s.started = true
    if not s.prev_bucket and in_prev(f) then s.t, s.p = s.t + 1, s.p + 1 end  -- a first sighting last slot
    if in_cur(f) or repeated(f) then s.t = s.t + 1 end  -- a first sighting earlier in this slot
  end
  local n = weight[f]  -- a hit may stand for others of its bucket left out
  s.t = s.t + n
  if s.a < min_authors then
    local nm = k .. authors[i]
    if not recorded[nm] then
      recorded[nm] = true
      s.a = s.a + 1
      writes[#writes + 1] = nm
      writes[#writes + 1] = 1
    end
  end
  if fresh_of[i] == nil then fresh_of[i] = tonumber(first[i]) >= newer_than[site_of[i]] end
  if fresh_of[i] then s.w = s.w + n end
  if lean(r) then s.h = s.h + n end
  if member(r) then s.member, s.c = true, true end
end
for _, k in ipairs(order) do
  local s = state[k]
  if s.L then
    table.insert(out[3], k)
    table.insert(out[3], s.L)
  elseif s.t >= (s.member and link_size or min_size) and s.t >= peak_ratio * s.m
      and s.t * history_s >= burst_ratio * s.e * window then
    out[#out + 1] = {k, s.t, s.a, s.w, s.h, s.e, s.m}
  end
  writes[#writes + 1] = k
  writes[#writes + 1] = string.format('%d %d %d %d %d %d %d %d %d %d', s.t, s.p, s.e, s.m, s.a, s.w, s.x, s.h, s.y,
                                      s.c and 1 or 0)
end
chunked('HSET', B, writes)
redis.call('EXPIRE', B, tonumber(ARGV[4]))
return finish()
"""


# One declarative table: parameter -> check.
_PARAMS = {
    "bands": integer(1),
    "min_size": integer(2),
    "min_authors": integer(1),
    "window_s": integer(1),
    "min_words": integer(1),
    "hold": flag(),
    "baseline_days": integer(1, 365),
    "burst_ratio": real(1.0, 1e6),
    "peak_ratio": real(1.0, 1e6),
    "new_author_s": integer(0, 10**9),
    "warmup_s": integer(0, 10**9),
    "link_size": integer(2),
    "new_author_share": real(0.0, 1.0),
    "lean_share": real(0.0, 1.0),
    "lean_quantile": real(0.5, 0.999),
    "signals": one_of(SIGNALS),
}


def campaign_keys(keys: Keys) -> dict[str, str]:
    """The campaign records every process reads (active campaigns, sizes, last members, seeds)."""
    return {"active": keys.campaigns("active"), "last": keys.campaigns("last"),
            "size": keys.campaigns("size"), "seed": keys.campaigns("seed")}


def scheme_tag(hasher: MinHasher, bands: int) -> str:
    """A short tag of everything that decides a comment's band keys (tokens, MinHash, bands)."""
    scheme = {"tokenizer": Tokenizer(**CAMPAIGN_TOKENIZER).params(), "num_perm": hasher.num_perm,
              "shingle": hasher.shingle, "seed": hasher.seed, "max_words": hasher.max_words, "bands": bands}
    return hashlib.blake2b(json.dumps(scheme, sort_keys=True).encode(), digest_size=4).hexdigest()


def author_key(site: str, author: str, comment_id: str) -> bytes:
    """8 bytes naming an author on a site; a comment with no author counts as its own (new) author."""
    raw = f"a:{site}\x00{author}" if author else f"c:{site}\x00{comment_id}"
    return hashlib.blake2b(raw.encode("utf-8", "surrogatepass"), digest_size=8, person=b"seawall-author").digest()


def _get(comment, name: str) -> str:
    value = comment.get(name, "") if isinstance(comment, dict) else getattr(comment, name, "")
    if value.__class__ is str:  # the worker's comments: skip the checks below
        return value
    if isinstance(value, bytes):
        value = value.decode("utf-8", "replace")
    return value if isinstance(value, str) else str(value or "")


class SiteScores:
    """Each site's recent scores, kept by one worker: the baseline a family's scores lean against.

    Parameters
    ----------
    quantile : a score above this quantile of the site's recent scores leans spam-ward.
    size : recent scores kept per site (a ring).
    min_count : fewer scores than this give no baseline (nothing leans).
    max_sites : sites tracked; beyond this the least recently added site is forgotten.
    """

    def __init__(self, *, quantile: float = 0.9, size: int = 2000, min_count: int = 200, max_sites: int = 1024):
        self.quantile = quantile
        self.size = size
        self.min_count = min_count
        self.max_sites = max_sites
        self._rings: dict[str, tuple[np.ndarray, list[int]]] = {}  # site -> (ring, [next place, count])

    def thresholds(self, sites) -> dict[str, float | None]:
        """The spam-ward threshold of each site (None while it has too few scores)."""
        out = {}
        for site in set(sites):
            ring = self._rings.get(site)
            if ring is None or ring[1][1] < self.min_count:
                out[site] = None
            else:
                out[site] = float(np.quantile(ring[0][:ring[1][1]], self.quantile))
        return out

    def add(self, sites: Sequence[str], scores: Sequence[float]) -> None:
        by_site: dict[str, list[float]] = {}
        for site, score in zip(sites, scores):
            by_site.setdefault(site, []).append(score)
        for site, values in by_site.items():
            ring = self._rings.pop(site, None)  # re-inserted last: the dict's order is recency
            if ring is None:
                if len(self._rings) >= self.max_sites:
                    del self._rings[next(iter(self._rings))]
                ring = (np.zeros(self.size), [0, 0])
            self._rings[site] = ring
            data, state = ring
            values = np.asarray(values[-self.size:], dtype=float)
            places = (state[0] + np.arange(values.size)) % self.size
            data[places] = values
            state[0] = int((state[0] + values.size) % self.size)
            state[1] = min(self.size, state[1] + values.size)


def _sorted_unique(values: np.ndarray, kind: str | None = None) -> np.ndarray:
    values = np.sort(values, kind=kind)
    if values.size < 2:
        return values
    keep = np.empty(values.size, dtype=bool)
    keep[0] = True
    np.not_equal(values[1:], values[:-1], out=keep[1:])
    return values[keep]


class Sightings:
    """One worker's copy of the band keys seen in the recent slots, in step with the slots' lists in Redis.

    Each slot's list in Redis holds one string per batch: that batch's first
    sightings, 8 bytes a key.  A worker reads what the others added since its
    last batch (its offset into each list) in the same script call that adds
    its own, so Redis never tests membership: the worker does, on sorted numpy
    chunks (merged as they pile up, so a slot costs O(log n) searches).  Before
    each batch the worker reads what was appended since (one LRANGE per slot,
    pipelined: a start or a new slot reads the whole list), so a key another
    worker saw in its last batch is a hit here.  A key two workers first see
    between that read and their script calls, within a millisecond, is a first
    sighting for both: its bucket misses that one hit.
    """

    def __init__(self):
        self._slots: dict[int, list] = {}  # slot -> [sorted unique uint64 chunks, entries read from its list]

    def catch_up(self, client, lists: dict[int, str]) -> None:
        """Read what was appended to each slot's list since this worker last read it (all of a slot it has not
        read yet: a start, a new slot), in one round trip."""
        pipe = client.pipeline(transaction=False)
        for slot, key in lists.items():
            pipe.lrange(key, self._slots.setdefault(slot, [[], 0])[1], -1)
        for slot, blobs in zip(lists, pipe.execute()):
            self.add(slot, blobs)

    def find(self, slot: int, values: np.ndarray) -> tuple[np.ndarray, int]:
        """Which ``values`` the slot has seen, and this worker's offset into the slot's list."""
        for old in [s for s in self._slots if s < slot - 1]:
            del self._slots[old]
        chunks, offset = self._slots.setdefault(slot, [[], 0])
        found = np.zeros(values.size, dtype=bool)
        if chunks:
            order = np.argsort(values)  # sorted queries: searches that walk each chunk once
            ordered = values[order]
            hit = np.zeros(values.size, dtype=bool)
            for chunk in chunks:
                at = np.searchsorted(chunk, ordered)
                np.minimum(at, chunk.size - 1, out=at)
                hit |= chunk[at] == ordered
            found[order] = hit
        return found, offset

    def add(self, slot: int, blobs, own: np.ndarray | None = None, *, pushed: bool = False) -> None:
        """Add the list entries read (``blobs``) and this worker's own first sightings (``own``, pushed last)."""
        entry = self._slots.setdefault(slot, [[], 0])
        entry[1] += len(blobs) + (1 if pushed else 0)
        parts = [np.frombuffer(b, dtype=">u8") for b in blobs] + ([own] if own is not None and own.size else [])
        if not parts:
            return
        chunks = entry[0]
        chunks.append(_sorted_unique(np.concatenate(parts).astype(np.uint64)))
        while len(chunks) > 1 and chunks[-2].size <= 2 * chunks[-1].size:
            last = chunks.pop()
            # two sorted runs: a stable sort merges them in linear time
            chunks[-1] = _sorted_unique(np.concatenate((chunks[-1], last)), kind="stable")


class CampaignPolicy:
    """A :class:`worker.policies.BatchPolicy` that finds campaigns (see the module doc).

    Parameters
    ----------
    keys : key names.
    hasher : the MinHasher every worker of the deployment uses (same seed).
    bands : LSH bands; must divide ``hasher.num_perm``.
    min_size, min_authors, window_s : a bucket is dense with ``min_size``
        comments from ``min_authors`` distinct authors within ``window_s`` seconds.
    min_words : comments with fewer normalized words ("thanks!", "+1") are never members.
    hold : hold members that routing would publish.
    baseline_days : days of a history generation; a band key's history covers one to two.
    burst_ratio, peak_ratio : a dense bucket is bursty when its window count
        is at least ``burst_ratio`` times what its history's average rate
        predicts for one window and ``peak_ratio`` times the busiest window of
        its history (campaigns' windows left out).
    new_author_s : an author first seen on a site less than this long ago is new.
    warmup_s : authors first seen in a site's first ``warmup_s`` (since the
        detector first saw the site) are never new: it is learning the regulars.
    link_size : comments a bucket of a known member needs to be linked to its campaign.
    new_author_share : share of a bucket's comments that must be by new authors.
    lean_share : share of a bucket's comments whose score must lean spam-ward.
    lean_quantile : a score leans spam-ward above this quantile of the site's recent scores.
    signals : the second signal required: ``"either"`` (new authors or a
        spam-ward lean), ``"authors"``, ``"lean"`` or ``"both"``.
    clock : wall clock (epoch seconds).
    """

    def __init__(self, *, keys: Keys, hasher: MinHasher, bands: int = 16, min_size: int = 10, min_authors: int = 3,
                 window_s: int = 600, min_words: int = 6, hold: bool = True, baseline_days: int = 7,
                 burst_ratio: float = 5.0, peak_ratio: float = 2.0, new_author_s: int = 3 * DAY_S,
                 warmup_s: int = DAY_S, new_author_share: float = 0.5, link_size: int = 3, lean_share: float = 0.5,
                 lean_quantile: float = 0.9, signals: str = "authors",
                 clock: Callable[[], float] = time.time, events_maxlen: int = EVENTS_MAXLEN):
        set_params(self, _PARAMS, locals())
        if hasher.num_perm % bands:
            raise ValueError(f"CampaignPolicy: bands {bands} must divide the signature length {hasher.num_perm}")
        self.keys = keys
        self.hasher = hasher
        self.clock = clock
        self.events_maxlen = events_maxlen
        self.tokenizer = Tokenizer(**CAMPAIGN_TOKENIZER)
        self.tag = scheme_tag(hasher, bands)
        self.site_scores = SiteScores(quantile=lean_quantile)
        self._script = None
        # band key (uint64) -> (campaign, until): buckets this worker saw linked to a campaign.  A comment
        # with such a key is a member even when the bucket is not linked in the current slot yet, and its
        # other buckets are linked from link_size comments on, so the campaign follows its variants.
        self._links: dict[int, tuple[str, float]] = {}
        self._pending: dict[int, tuple[int, float]] = {}  # linked band key -> (hits left uncounted, last counted)
        self._sightings = Sightings()
        self._purge_at = -np.inf

    def apply(self, client, comments: Sequence, scores: Sequence[float], decisions: list[Decision]) -> list[Decision]:
        """Members the model would publish are held (rule ``campaign``); every member's decision names its campaign."""
        members = self.observe(client, comments, scores)
        if not members:
            return list(decisions)
        out = list(decisions)
        for i, campaign in members.items():
            d = out[i]
            if self.hold and d.action == Action.PUBLISH:
                out[i] = Decision(Action.HOLD, CAMPAIGN_RULE, campaign)
            else:
                out[i] = Decision(d.action, d.rule, campaign)
        return out

    # -- keys ------------------------------------------------------------------------------

    def state_keys(self, now: float) -> list[str]:
        """The script's KEYS at time ``now`` (see ``_STATE_SCRIPT``)."""
        slot = int(now // (self.window_s / 2.0))
        history = int(now // (self.baseline_days * DAY_S))
        generation = int(now // self._author_generation_s())
        k = self.keys.campaigns
        return [k(self.tag, "sightings", str(slot)), k(self.tag, "sightings", str(slot - 1)),
                k(self.tag, "buckets", str(slot)), k(self.tag, "buckets", str(slot - 1)),
                k("authors", str(generation)), k("authors", str(generation - 1)), k("sites"), k(self.tag, "since"),
                k(self.tag, "history", str(history)), k(self.tag, "history", str(history - 1)),
                campaign_keys(self.keys)["active"]]

    def _author_generation_s(self) -> int:
        # an author is remembered for one to two generations after their last comment
        return max(self.new_author_s, 30 * DAY_S)

    # -- the batch -------------------------------------------------------------------------

    def observe(self, client, comments: Sequence, scores: Sequence[float] | None = None) -> dict[int, str]:
        """Record the batch in the shared state; return ``{index: campaign id}`` of campaign members.

        ``scores`` are the model's spam probabilities of ``comments`` (or None):
        they feed the spam-ward lean signal.
        """
        if not comments:
            return {}
        now = self.clock()
        texts = [_get(c, "text") for c in comments]
        sites = [_get(c, "site") for c in comments]
        if scores is not None and len(scores) != len(comments):
            raise ValueError(f"campaigns: {len(scores)} scores for {len(comments)} comments")
        eligible, keys = self.band_keys(texts)
        flat = keys.ravel()
        _, first_places = np.unique(flat, return_index=True)
        repeated = np.ones(flat.size, dtype=bool)  # the key occurs earlier in the batch
        repeated[first_places] = False
        known, skip, weights = self._known_members(keys, now)
        slot = int(now // (self.window_s / 2.0))
        state_keys = self.state_keys(now)
        self._sightings.catch_up(client, {slot: state_keys[0], slot - 1: state_keys[1]})
        in_cur, cur_offset = self._sightings.find(slot, flat)
        in_prev, prev_offset = self._sightings.find(slot - 1, flat)
        hit = repeated | in_cur | in_prev
        hit[skip] = False  # hits this worker leaves uncounted
        hit_places = np.flatnonzero(hit)
        hit_flags = (repeated[hit_places] * 1 + in_cur[hit_places] * 2 + in_prev[hit_places] * 4).astype(np.uint8)
        hit_weights = [weights.get(p, 1) for p in (hit_places + 1).tolist()] if weights else [1] * hit_places.size
        hit_rows = " ".join(f"{r} {w}" for r, w in zip((hit_places // self.bands).tolist(), hit_weights))
        firsts = flat[first_places[~in_cur[first_places]]]  # first sightings in this slot, once each
        row_flags = self._lean_rows(eligible, sites, scores).astype(np.uint8)  # 1: leans spam-ward
        row_flags[list(known)] += 2  # 2: a known member
        site_list = list(dict.fromkeys(sites))
        site_index = {s: n for n, s in enumerate(site_list, 1)}
        authors = b"".join(author_key(site, _get(c, "author"), _get(c, "id")) for site, c in zip(sites, comments))
        slot_s = self.window_s / 2.0
        slot_ttl = max(1, int((int(now // slot_s) + 2) * slot_s - now) + 1)  # relative: the server's clock may differ
        if self._script is None:
            self._script = client.register_script(_STATE_SCRIPT)
        reply = self._script(
            keys=state_keys,
            args=[f"{now:.3f}", self.min_size, self.bands, slot_ttl, 2 * self._author_generation_s(),
                  2 * self.baseline_days * DAY_S + 3600, self.new_author_s, self.min_authors,
                  flat[hit_places].astype(">u8").tobytes(), authors,
                  " ".join(map(str, eligible.tolist())), " ".join(str(site_index[s]) for s in sites),
                  hit_flags.tobytes(), row_flags.tobytes(), self.link_size, self.warmup_s, self.window_s,
                  self.burst_ratio, self.peak_ratio, self._history_start(now), hit_rows, "1" if known else "0",
                  firsts.astype(">u8").tobytes(), cur_offset, prev_offset, *site_list],
            client=client)
        self._sightings.add(slot, reply[3], firsts, pushed=firsts.size > 0)
        self._sightings.add(slot - 1, reply[4])
        reply = [*reply[:3], *reply[5:]]
        members = self._decide(client, comments, eligible, keys, known, reply, state_keys[2], now)
        if scores is not None and self.signals != "authors":
            plain = [i for i in range(len(comments)) if i not in members]
            self.site_scores.add([sites[i] for i in plain], [float(scores[i]) for i in plain])
        return members

    def band_keys(self, texts: Sequence[str]) -> tuple[np.ndarray, np.ndarray]:
        """The comments with at least ``min_words`` normalized words, and their LSH band keys.

        Returns their indices in ``texts`` and a ``(len(indices), bands)``
        uint64 array: the MinHash bands of word shingles of the tokens of
        :data:`CAMPAIGN_TOKENIZER`, the same on every worker.
        """
        flat, counts = self.tokenizer.words_many(texts)
        counts = np.asarray(counts, dtype=np.int64)
        eligible = np.flatnonzero(counts >= self.min_words)
        if eligible.size < counts.size:  # keep only the eligible comments' words
            ends = np.cumsum(counts)
            flat = [w for i in eligible.tolist() for w in flat[ends[i] - counts[i]:ends[i]]]
        return eligible, band_hashes(self.hasher.signatures_of_flat(flat, counts[eligible]), self.bands)

    def _lean_rows(self, eligible: np.ndarray, sites: list[str], scores) -> np.ndarray:
        """Which rows score above their site's spam-ward threshold (a bool per row)."""
        out = np.zeros(eligible.size, dtype=bool)
        if scores is None or not eligible.size or self.signals == "authors":  # the lean is not asked for
            return out
        limits = self.site_scores.thresholds(sites[i] for i in eligible.tolist())
        for row, i in enumerate(eligible.tolist()):
            limit = limits[sites[i]]
            out[row] = limit is not None and float(scores[i]) > limit
        return out

    def _history_start(self, now: float) -> int:
        """Where the previous history generation starts: the baselines cover from there (or the detector's start)."""
        generation_s = self.baseline_days * DAY_S
        return int((now // generation_s - 1) * generation_s)

    def _decide(self, client, comments, eligible, keys, known: dict[int, str], reply, buckets_key: str,
                now: float) -> dict[int, str]:
        since = float(reply[0]) if reply and reply[0] is not None else now
        linked_keys = reply[2] if len(reply) > 2 else []
        buckets = reply[3:]
        if not buckets and not known and not linked_keys:  # the usual batch: no bucket is dense and bursty
            return {}
        history_s = max(now - max(since, self._history_start(now)) - self.window_s, float(self.window_s))
        active = {_text(k) for k in reply[1]}
        members: dict[int, str] = {}
        for row, campaign in known.items():
            if campaign in active:
                members[int(eligible[row])] = campaign
            else:  # ended: forget its buckets
                self._links = {k: v for k, v in self._links.items() if v[0] != campaign}
        linked: dict[int, str] = {}  # band keys linked to an active campaign, as Redis has them
        for key, campaign in zip(linked_keys[::2], linked_keys[1::2]):
            campaign = _text(campaign)
            if campaign in active:
                linked[int.from_bytes(key, "big")] = campaign
                self._learn(int.from_bytes(key, "big"), campaign, now)
        if linked:
            on_link = np.isin(keys, np.fromiter(linked, dtype=np.uint64, count=len(linked)))
            for row in np.flatnonzero(on_link.any(axis=1)).tolist():
                members.setdefault(int(eligible[row]), linked[int(keys[row][on_link[row]][0])])
        facts_of = {int.from_bytes(key, "big"): self._bucket_facts(int(t), int(a), int(w), int(h), int(e), int(m),
                                                                   history_s)
                    for key, t, a, w, h, e, m in buckets}
        on_bucket = np.isin(keys, np.fromiter(facts_of, dtype=np.uint64, count=len(facts_of))) if facts_of else None
        links: dict[int, str] = {}  # band keys this batch links, with their campaign
        seeds: dict[str, set[str]] | None = None  # campaign -> its first member's band keys, read when needed
        rows = np.flatnonzero(on_bucket.any(axis=1)).tolist() if on_bucket is not None else []
        for row in rows:
            i = int(eligible[row])
            row_keys = keys[row]
            # (count, band, facts) of buckets that could start or extend a campaign
            qualifying = [(facts_of[int(row_keys[band])]["members"], band, facts_of[int(row_keys[band])])
                          for band in np.flatnonzero(on_bucket[row]).tolist()]
            qualifying = [q for q in qualifying if q[2]["bursty"] and q[2]["signal"]]
            campaign = members.get(i) or next((links[k] for k in map(int, row_keys) if k in links), None)
            if campaign is None:
                starters = [q for q in qualifying if q[2]["dense"]]
                if not starters:
                    continue
                total, band, facts = max(starters, key=lambda q: (q[0], q[2]["authors"]))
                bucket_list = [f"{int(k):016x}" for k in row_keys]
                if seeds is None:
                    seeds = self._load_seeds(client)
                campaign = self._campaign_of_seeds(bucket_list, active, seeds)
                if campaign is None:
                    earlier = facts["members"] - int((keys == row_keys[band]).any(axis=1).sum())
                    campaign = self._start(client, comments[i], int(row_keys[band]), bucket_list, facts,
                                           max(0, earlier), buckets_key, now)
                    active.add(campaign)
                    seeds[campaign] = set(bucket_list)
            members[i] = campaign
            for _total, band, _facts in qualifying:
                # only a bucket that is bursty and new-authored (or spam-ward) itself, with link_size
                # comments, joins the campaign: linking every bucket of every member would chain
                # merely similar comments into it (a format the campaign imitates, for one)
                links[int(row_keys[band])] = campaign
                self._learn(int(row_keys[band]), campaign, now)
        if members:
            self._record_members(client, members, links, buckets_key, now)
        return members

    def _bucket_facts(self, total: int, n_authors: int, new_hits: int, lean_hits: int, history: int, peak: int,
                      history_s: float) -> dict:
        """What one bucket's window figures say: dense, bursty against its history, the second signals.

        Bursty is far above both the history's average rate (``burst_ratio``
        times it) and its busiest window (``peak_ratio`` times it), so a family
        that is busy at the same hour every day is not bursty at that hour.
        """
        expected = history * self.window_s / history_s
        new_share = new_hits / total if total else 0.0
        lean_share = lean_hits / total if total else 0.0
        by_authors = new_share >= self.new_author_share
        by_lean = lean_share >= self.lean_share
        signal = {"either": by_authors or by_lean, "authors": by_authors, "lean": by_lean,
                  "both": by_authors and by_lean}[self.signals]
        return {"dense": total >= self.min_size and n_authors >= self.min_authors,
                "bursty": total >= self.burst_ratio * expected and total >= self.peak_ratio * peak,
                "signal": signal, "members": total, "peak": peak,
                "authors": n_authors, "new_share": round(new_share, 3), "lean_share": round(lean_share, 3),
                "expected": round(expected, 3),
                "by": [n for n, on in (("authors", by_authors), ("lean", by_lean)) if on]}

    def _known_members(self, keys: np.ndarray, now: float) -> tuple[dict[int, str], list[int], dict[int, int]]:
        """Rows of ``keys`` (comments x bands) with a band key this worker saw linked, as ``{row: campaign}``;
        then which of those keys' hits the batch leaves uncounted (1-based places) and which count for
        several (``{place: hits it stands for}``).

        A learnt link is trusted for one window after the bucket was last seen
        linked: a campaign whose buckets are no longer linked (no longer bursty
        against their history) fades out of a worker's memory.  In a flood most
        comments are such members: a worker counts a linked bucket's hits once
        per KNOWN_SAMPLE (that hit standing for the others), and at least once
        per quarter window, so the bucket's figures and link stay alive from
        slot to slot at a fraction of the Redis work.
        """
        if not self._links or not keys.size:
            return {}, np.zeros(0, dtype=np.int64), {}
        if now >= self._purge_at:  # forget expired links now and then, not every batch
            self._links = {k: v for k, v in self._links.items() if v[1] > now}
            self._purge_at = now + self.window_s / 4.0
        if not self._links:
            self._pending.clear()
            return {}, np.zeros(0, dtype=np.int64), {}
        learnt = np.isin(keys, np.fromiter(self._links, dtype=np.uint64, count=len(self._links)))
        rows = np.flatnonzero(learnt.any(axis=1))
        first_learnt = keys[rows, learnt[rows].argmax(axis=1)].tolist()
        known = {r: self._links[k][0] for r, k in zip(rows.tolist(), first_learnt)}
        places = np.flatnonzero(learnt.ravel())
        order = np.argsort(keys.ravel()[places], kind="stable")
        places = places[order]  # grouped by key, in arrival order within a key
        uniq, starts, counts = np.unique(keys.ravel()[places], return_index=True, return_counts=True)
        state = [self._pending.get(k, (0, -np.inf)) for k in uniq.tolist()]
        pending = np.array([p for p, _ in state], dtype=np.int64)
        stale = np.array([now - t >= self.window_s / 4.0 for _, t in state], dtype=bool)
        # a stale key counts its first hit at once (standing for what was pending); otherwise every
        # KNOWN_SAMPLE-th hit counts, standing for the KNOWN_SAMPLE - 1 before it
        offset = np.where(stale, _KNOWN_SAMPLE - 1, pending)
        rank = np.arange(places.size) - np.repeat(starts, counts)
        kept = (np.repeat(offset, counts) + rank + 1) % _KNOWN_SAMPLE == 0
        weight = np.full(places.size, _KNOWN_SAMPLE)
        weight[starts[stale]] = pending[stale] + 1
        left = (offset + counts) % _KNOWN_SAMPLE
        counted = np.add.reduceat(kept, starts) > 0 if starts.size else np.zeros(0, dtype=bool)
        for key, p, c, (_, t) in zip(uniq.tolist(), left.tolist(), counted.tolist(), state):
            self._pending[key] = (p, now if c else t)
        if len(self._pending) > 2 * len(self._links):
            self._pending = {k: v for k, v in self._pending.items() if k in self._links}
        weights = {p: w for p, w in zip((places[kept] + 1).tolist(), weight[kept].tolist()) if w > 1}
        return known, places[~kept], weights

    def _learn(self, band_key: int, campaign: str, now: float) -> None:
        if len(self._links) >= _MAX_LEARNT_LINKS:
            self._links.clear()
        self._links[band_key] = (campaign, now + self.window_s)

    def _load_seeds(self, client) -> dict[str, set[str]]:
        out = {}
        for k, v in client.hgetall(campaign_keys(self.keys)["seed"]).items():
            try:
                out[_text(k)] = set(json.loads(v))
            except (ValueError, TypeError):
                continue
        return out

    @staticmethod
    def _campaign_of_seeds(bucket_list: list[str], active: set[str], seeds: dict[str, set[str]]) -> str | None:
        """The active campaign whose first member shares a band key with this comment, if any.

        Variants of one template that fill different buckets at the same
        moment (a burst) then join one campaign instead of announcing several.
        """
        mine = set(bucket_list)
        return next((c for c, keys in seeds.items() if c in active and keys & mine), None)

    def _start(self, client, comment, band_key: int, bucket_list: list[str], facts: dict, earlier: int,
               buckets_key: str, now: float) -> str:
        """Announce a campaign (once: the link on its bucket decides which worker does); ``earlier`` near-
        duplicates came before this batch, whose members :meth:`_record_members` counts."""
        campaign = "c" + hashlib.blake2b(f"{band_key:016x}:{int(now)}".encode(), digest_size=6).hexdigest()
        link_field = band_key.to_bytes(8, "big") + b"L"
        if not client.hsetnx(buckets_key, link_field, campaign):  # another worker announced this bucket first
            other = client.hget(buckets_key, link_field)
            return _text(other) if other is not None else campaign
        ck = campaign_keys(self.keys)
        data = {"id": campaign, "site": _get(comment, "site")[:200], "members": facts["members"],
                "authors": facts["authors"], "new_share": facts["new_share"], "lean_share": facts["lean_share"],
                "expected": facts["expected"], "signals": facts["by"], "window_s": self.window_s,
                "started": round(now, 3), "example_id": _get(comment, "id")[:200]}
        pipe = client.pipeline(transaction=True)
        pipe.hset(ck["active"], campaign, json.dumps(data, sort_keys=True))
        pipe.hset(ck["last"], campaign, f"{now:.3f}")
        pipe.hset(ck["size"], campaign, earlier)
        pipe.hset(ck["seed"], campaign, json.dumps(bucket_list))
        add_event(client, self.keys.events, "campaign_start", data, ts=now, maxlen=self.events_maxlen, pipeline=pipe)
        pipe.execute()
        log.warning("campaign_start %s: %d near-duplicates from %d+ authors within %ds (%.2f expected), new-author "
                    "share %.2f, spam-ward share %.2f", campaign, facts["members"], facts["authors"], self.window_s,
                    facts["expected"], facts["new_share"], facts["lean_share"])
        return campaign

    def _record_members(self, client, members: dict[int, str], links: dict[int, str], buckets_key: str,
                        now: float) -> None:
        ck = campaign_keys(self.keys)
        pipe = client.pipeline(transaction=False)
        if links:
            pipe.hset(buckets_key, mapping={k.to_bytes(8, "big") + b"L": c for k, c in links.items()})
        for campaign, count in Counter(members.values()).items():  # once per campaign and batch
            pipe.hincrby(ck["size"], campaign, count)
            pipe.hset(ck["last"], campaign, f"{now:.3f}")
        pipe.execute()


def end_idle_campaigns(client, keys: Keys, *, now: float, window_s: int, events_maxlen: int = EVENTS_MAXLEN) -> list[dict]:
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
        pipe = client.pipeline(transaction=True)
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
