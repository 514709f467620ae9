"""Near-duplicate campaign detection in the comment path, shared by all workers.

For each batch, :class:`CampaignPolicy` computes the MinHash signatures of the
comments (:mod:`model.minhash`) and adds each comment to the LSH bucket of each
of its bands, in Redis, so that a template posted through many workers meets in
the same buckets.  Redis keeps:

* ``campaigns:seen:{slot}``: per half window, a set of the band keys first
  seen in it (8 bytes each: hashes of the MinHash bands, never text), so a
  band key that only one comment ever had costs no per-band Redis call;
* ``campaigns:lsh:{key}``: per band key seen twice within the window, a hash
  with the number of comments, the second member's time, the campaign it is
  linked to (if any) and one field per author *hash* (never the author id
  itself); its counts cover the ``window_s`` after its second member (the
  first was seen at most ``window_s`` earlier), then it starts afresh;
* ``campaigns:seed``: per active campaign, its first member's band keys;
* ``campaigns:active``, ``campaigns:size``, ``campaigns:last``: the active
  campaigns, their member counts and their last member's time.

A bucket that holds at least ``min_size`` comments from at least ``min_authors`` distinct authors
within the window starts a campaign (one ``campaign_start`` event: the
``SET NX`` on the bucket's link decides which worker announces it).  Later
comments that land in any bucket linked to an active campaign are its members;
another bucket of a member that is dense itself (N comments, M authors) is
linked too, and a newly dense bucket that shares a band key with an active
campaign's first member joins that campaign, so the campaign follows the
template's variations (and a burst is announced once) without chaining in
comments that are merely similar to a member.  With ``hold=True`` members
the model would publish are held for review: this catches a new wave before
the nightly retrain has learned it.

Writes are safe to repeat, as :mod:`worker.policies` requires: a redelivered
comment counts twice in its buckets, which can only bring a campaign forward
by one comment.  :func:`end_idle_campaigns`
ends campaigns with no new member for ``window_s`` (``campaign_end``).
"""
from __future__ import annotations

import hashlib
import json
import logging
import time
from collections import Counter
from collections.abc import Callable, Sequence

import numpy as np

from model.minhash import MinHasher, band_hashes
from worker.events import EVENTS_MAXLEN, add_event
from worker.routing import CAMPAIGN_RULE, Decision
from worker.settings import Keys

log = logging.getLogger("seawall.worker.campaigns")

# Adds every comment of a batch to its bands' buckets and reports, for each
# comment whose fullest bucket holds at least min_size comments, that bucket's
# size, distinct authors and band, and the campaigns its buckets are linked to.
#
# Most buckets only ever hold one comment, so a band key's first sighting only
# makes it a member of the current time slot's set (KEYS[1]; slots are half a
# window long, KEYS[2] is the previous one, so together they reach back at
# least half a window and at most a whole one): the whole batch costs two
# SMISMEMBERs and one SADD, whatever its size and number of bands.  A key
# already in either slot (or earlier in the batch) is a second sighting within
# the window, and only then does its bucket get a hash of its own under the
# rich prefix: {n: comments, t0: its second comment's time, L: linked
# campaign, <author hash>: 1, ...}, made with n = 2 and the current author.
# The first comment's author is not known, so authors are counted among the
# later members only: M distinct authors are never reached early.  A bucket
# costs 2 calls per comment from then on; only one holding min_size comments
# is checked for age (by the writers' clock: older than the window, it starts
# afresh) and link (one HMGET) and authors (HLEN minus the fixed fields; once
# it has min_authors, later authors are not written).  The EXPIREs free
# memory: a slot lasts until the end of the next slot, a bucket one window.
# KEYS: current slot, previous slot.  ARGV: window, now, min_size, bands, rich
# prefix, current slot's TTL, band keys (8 bytes each, bands per comment),
# author hashes (16 hex each), the 1-based places of band keys that occur
# earlier in the batch, min_authors, and the 0-based comments to leave out of
# the buckets (the worker knows them as members already; they still go into
# the slot sets).  Links come back as (band, campaign) pairs.
_ADD_SCRIPT = """
local window, now, min_size, bands = tonumber(ARGV[1]), tonumber(ARGV[2]), tonumber(ARGV[3]), tonumber(ARGV[4])
local prefix, slot_ttl, blob, authors = ARGV[5], tonumber(ARGV[6]), ARGV[7], ARGV[8]
local min_authors = tonumber(ARGV[10])
local n_fields = #blob / 8
local fields = {}
for f = 1, n_fields do fields[f] = string.sub(blob, 8 * f - 7, 8 * f) end
local repeated = {}  -- places of keys that occur earlier in the batch
for f in string.gmatch(ARGV[9], '%d+') do repeated[tonumber(f)] = true end
local known = {}  -- 0-based comments the worker already knows as members (a band key linked to a campaign)
for i in string.gmatch(ARGV[11], '%d+') do known[tonumber(i)] = true end
local CHUNK = 7000  -- unpack() is bounded by the Lua stack (8000)
local cur, prev
if n_fields <= CHUNK then
  cur = redis.call('SMISMEMBER', KEYS[1], unpack(fields))
  prev = redis.call('SMISMEMBER', KEYS[2], unpack(fields))
  redis.call('SADD', KEYS[1], unpack(fields))
else
  cur, prev = {}, {}
  for s = 1, n_fields, CHUNK do
    local e = math.min(s + CHUNK - 1, n_fields)
    local c = redis.call('SMISMEMBER', KEYS[1], unpack(fields, s, e))
    local p = redis.call('SMISMEMBER', KEYS[2], unpack(fields, s, e))
    for i = 1, #c do cur[s + i - 1], prev[s + i - 1] = c[i], p[i] end
  end
  for s = 1, n_fields, CHUNK do redis.call('SADD', KEYS[1], unpack(fields, s, math.min(s + CHUNK - 1, n_fields))) end
end
redis.call('EXPIRE', KEYS[1], slot_ttl)
local out = {}
for i = 0, n_fields / bands - 1 do
  local author = nil
  local best_size, best_authors, best_band = 0, 0, -1
  local links = {}
  for j = 1, (known[i] and 0 or bands) do
    local f = i * bands + j
    if cur[f] == 1 or prev[f] == 1 or repeated[f] then
      author = author or string.sub(authors, 16 * i + 1, 16 * i + 16)
      local bucket = prefix .. string.format('%02x%02x%02x%02x%02x%02x%02x%02x', string.byte(fields[f], 1, 8))
      local size = redis.call('HINCRBY', bucket, 'n', 1)
      if size >= min_size then
        local got = redis.call('HMGET', bucket, 't0', 'L')
        local link = got[2]
        if now - tonumber(got[1] or ARGV[2]) >= window then  -- older than the window: start afresh
          redis.call('DEL', bucket)
          size = redis.call('HINCRBY', bucket, 'n', 1)
          redis.call('HSET', bucket, 't0', ARGV[2], author, '1')
          redis.call('EXPIRE', bucket, window)
        else
          local na = redis.call('HLEN', bucket) - 2
          if link then
            na = na - 1
            table.insert(links, j - 1)
            table.insert(links, link)
          end
          if na < min_authors then  -- past M, more authors change nothing: skip the write
            na = na + redis.call('HSETNX', bucket, author, '1')
          end
          if size > best_size or (size == best_size and na > best_authors) then
            best_size, best_authors, best_band = size, na, j - 1
          end
        end
      elseif size == 1 then
        size = 2
        redis.call('HSET', bucket, 'n', 2, 't0', ARGV[2], author, '1')
        redis.call('EXPIRE', bucket, window)
      else
        redis.call('HSETNX', bucket, author, '1')
      end
    end
  end
  if best_size >= min_size then table.insert(out, {i, best_size, best_authors, best_band, links}) end
end
return out
"""

_KNOWN_SAMPLE = 4
_MAX_LEARNT_LINKS = 10_000  # linked buckets a worker remembers (a campaign links a few per template variant)

_PARAMS = {
    "bands": lambda v: isinstance(v, int) and v >= 1,
    "min_size": lambda v: isinstance(v, int) and v >= 2,
    "min_authors": lambda v: isinstance(v, int) and v >= 1,
    "window_s": lambda v: isinstance(v, int) and v >= 1,
    "min_words": lambda v: isinstance(v, int) and v >= 1,
    "hold": lambda v: isinstance(v, bool),
}


def campaign_keys(keys: Keys) -> dict[str, str]:
    return {"active": keys.key("campaigns", "active"), "last": keys.key("campaigns", "last"),
            "size": keys.key("campaigns", "size"), "seed": keys.key("campaigns", "seed")}


def author_hash(author: str, comment_id: str) -> str:
    """A short hash of the author; a comment with no author counts as its own author."""
    raw = f"a:{author}" if author else f"c:{comment_id}"
    return hashlib.blake2b(raw.encode("utf-8", "surrogatepass"), digest_size=8, person=b"seawall-author").hexdigest()


def _get(comment, name: str) -> str:
    value = comment.get(name, "") if isinstance(comment, dict) else getattr(comment, name, "")
    if value.__class__ is str:  # the worker's comments: skip the checks below
        return value
    if isinstance(value, bytes):
        value = value.decode("utf-8", "replace")
    return value if isinstance(value, str) else str(value or "")


class CampaignPolicy:
    """A :class:`worker.policies.BatchPolicy` that finds near-duplicate campaigns.

    Parameters
    ----------
    keys : key names.
    hasher : the MinHasher every worker of the deployment uses (same seed).
    bands : LSH bands; must divide ``hasher.num_perm``.
    min_size, min_authors, window_s : a campaign is ``min_size`` near-duplicates
        from ``min_authors`` distinct authors within ``window_s`` seconds.
    min_words : shorter comments ("thanks!", "+1") are never campaign members.
    hold : hold members that routing would publish.
    clock : wall clock (epoch seconds).
    """

    def __init__(self, *, keys: Keys, hasher: MinHasher, bands: int = 16, min_size: int = 10, min_authors: int = 3,
                 window_s: int = 600, min_words: int = 6, hold: bool = True,
                 clock: Callable[[], float] = time.time, events_maxlen: int = EVENTS_MAXLEN):
        for name, ok in _PARAMS.items():
            value = locals()[name]
            if not ok(value) or (name != "hold" and isinstance(value, bool)):
                raise ValueError(f"CampaignPolicy: bad {name} {value!r}")
        if hasher.num_perm % bands:
            raise ValueError(f"CampaignPolicy: bands {bands} must divide the signature length {hasher.num_perm}")
        self.keys = keys
        self.hasher = hasher
        self.bands = bands
        self.min_size = min_size
        self.min_authors = min_authors
        self.window_s = window_s
        self.min_words = min_words
        self.hold = hold
        self.clock = clock
        self.events_maxlen = events_maxlen
        self._script = None
        # band key (uint64) -> (campaign, until): buckets this worker saw linked to a campaign.  A comment
        # with such a key is a member (as the script would find), so its bands skip the bucket writes:
        # in a flood, most comments are members and would otherwise cost 3 calls per band.
        self._links: dict[int, tuple[str, float]] = {}

    def apply(self, client, comments: Sequence, scores: Sequence[float], decisions: list[Decision]) -> list[Decision]:
        """Members the model would publish are held (rule ``campaign``); every member's decision names its campaign."""
        members = self.observe(client, comments, scores)
        if not members:
            return list(decisions)
        out = list(decisions)
        for i, campaign in members.items():
            d = out[i]
            if self.hold and d.action == "publish":
                out[i] = Decision("hold", CAMPAIGN_RULE, campaign)
            else:
                out[i] = Decision(d.action, d.rule, campaign)
        return out

    def observe(self, client, comments: Sequence, scores: Sequence[float] | None = None) -> dict[int, str]:
        """Record the batch in the shared buckets; return ``{index: campaign id}`` of campaign members."""
        words = [self.hasher.words(_get(c, "text")) for c in comments]
        eligible = [i for i, w in enumerate(words) if len(w) >= self.min_words]
        if not eligible:
            return {}
        now = self.clock()
        signatures = self.hasher.signatures_of_words([words[i] for i in eligible])
        # every band key of the batch in one argument (8 bytes each), not one argument per band;
        # the rich buckets' names use their hex
        keys = band_hashes(signatures, self.bands).ravel()
        blob = keys.astype(">u8").tobytes()
        _, first = np.unique(keys, return_index=True)
        repeated = np.ones(keys.size, dtype=bool)
        repeated[first] = False
        repeated = " ".join(map(str, np.flatnonzero(repeated) + 1))  # usually empty
        authors = "".join(author_hash(_get(comments[i], "author"), _get(comments[i], "id")) for i in eligible)
        known = self._known_members(keys.reshape(len(eligible), self.bands), now)
        # one known member in KNOWN_SAMPLE still goes through every bucket, so the template's
        # other buckets keep growing and its variants keep being linked
        skip = [pos for pos in known if keys[pos * self.bands] % _KNOWN_SAMPLE]
        # first sightings go to slots of half a window: the current and the previous one reach back
        # at least half a window and at most a whole one
        slot_s = self.window_s / 2.0
        slot = int(now // slot_s)
        slot_ttl = max(1, int((slot + 2) * slot_s - now) + 1)  # relative: the server's clock may differ
        if self._script is None:
            self._script = client.register_script(_ADD_SCRIPT)
        reply = self._script(keys=[self._bucket("seen", str(slot)), self._bucket("seen", str(slot - 1))],
                             args=[self.window_s, f"{now:.3f}", self.min_size, self.bands, self._bucket("lsh", ""),
                                   slot_ttl, blob, authors, repeated, self.min_authors,
                                   " ".join(map(str, skip))],
                             client=client)
        if not reply and not known:  # the usual batch: no bucket holds min_size comments
            return {}

        hexes = blob.hex()
        width = 16 * self.bands
        ck = campaign_keys(self.keys)
        active = {_text(k) for k in client.hkeys(ck["active"])}
        members: dict[int, str] = {}
        new_links: dict[str, str] = {}
        dense: dict[int, str] = {}  # comment index -> its fullest bucket, when that bucket meets N and M
        seeds: dict[str, set[str]] | None = None  # campaign -> its first member's band keys, read when needed
        for pos, campaign in known.items():
            if campaign in active:
                members[eligible[pos]] = campaign
            else:  # ended: forget its buckets
                self._links = {k: v for k, v in self._links.items() if v[0] != campaign}
        for pos, size, n_authors, best_band, links in reply:
            i, pos = eligible[int(pos)], int(pos)
            bucket_list = [hexes[pos * width + 16 * j:pos * width + 16 * (j + 1)] for j in range(self.bands)]
            pairs = [(int(links[k]), _text(links[k + 1])) for k in range(0, len(links), 2)]
            for band, c in pairs:
                if c in active:
                    self._learn(bucket_list[band], c, now)
            linked = [c for _b, c in pairs] + [new_links[b] for b in bucket_list if b in new_links]
            campaign = next((c for c in linked if c in active), None)
            is_dense = size >= self.min_size and n_authors >= self.min_authors
            if campaign is None and is_dense:
                best = bucket_list[int(best_band)]
                if seeds is None:
                    seeds = self._load_seeds(client)
                campaign = self._campaign_of_seeds(client, bucket_list, active, seeds)
                if campaign is None:
                    campaign = self._start(client, comments[i], best, bucket_list, int(size), int(n_authors), now)
                    active.add(campaign)
                    seeds[campaign] = set(bucket_list)
            if campaign is None:
                continue
            members[i] = campaign
            if is_dense:
                # Only a bucket that itself holds N near-duplicates from M authors joins the campaign:
                # linking every bucket of every member would chain merely similar comments into it.
                dense[i] = bucket_list[int(best_band)]
                new_links[dense[i]] = campaign
                self._learn(dense[i], campaign, now)
        if members:
            self._record_members(client, comments, members, dense, now)
        return members

    def _known_members(self, keys, now: float) -> dict[int, str]:
        """``{row: campaign}`` for rows of ``keys`` (comments x bands) with a band key this worker saw linked.

        A learnt link is trusted for one window (the bucket may start afresh after that).
        """
        if not self._links:
            return {}
        self._links = {k: v for k, v in self._links.items() if v[1] > now}
        if not self._links:
            return {}
        learnt = np.fromiter(self._links, dtype=np.uint64, count=len(self._links))
        hits = np.isin(keys, learnt)
        rows = np.flatnonzero(hits.any(axis=1))
        return {int(r): self._links[int(keys[r][hits[r]][0])][0] for r in rows}

    def _learn(self, band_key_hex: str, campaign: str, now: float) -> None:
        if len(self._links) >= _MAX_LEARNT_LINKS:
            self._links.clear()
        self._links[int(band_key_hex, 16)] = (campaign, now + self.window_s)

    def _load_seeds(self, client) -> dict[str, set[str]]:
        out = {}
        for k, v in client.hgetall(campaign_keys(self.keys)["seed"]).items():
            try:
                out[_text(k)] = set(json.loads(v))
            except (ValueError, TypeError):
                continue
        return out

    def _campaign_of_seeds(self, client, bucket_list: list[str], active: set[str], seeds) -> str | None:
        """The active campaign whose first member shares a band key with this comment, if any.

        Variants of one template that fill different buckets at the same
        moment (a burst) then join one campaign instead of announcing several.
        """
        if seeds is None:
            raise RuntimeError("campaigns: seeds must be loaded first")
        mine = set(bucket_list)
        return next((c for c, keys in seeds.items() if c in active and keys & mine), None)

    def _start(self, client, comment, bucket: str, bucket_list: list[str], size: int, n_authors: int,
               now: float) -> str:
        campaign = "c" + hashlib.blake2b(f"{bucket}:{int(now)}".encode(), digest_size=6).hexdigest()
        key = self._bucket("lsh", bucket)
        if not client.hsetnx(key, "L", campaign):  # another worker announced this bucket's campaign first
            other = client.hget(key, "L")
            return _text(other) if other is not None else campaign
        ck = campaign_keys(self.keys)
        data = {"id": campaign, "site": _get(comment, "site")[:200], "members": size, "authors": n_authors,
                "window_s": self.window_s, "started": round(now, 3), "example_id": _get(comment, "id")[:200]}
        pipe = client.pipeline(transaction=True)
        pipe.hset(ck["active"], campaign, json.dumps(data, sort_keys=True))
        pipe.hset(ck["last"], campaign, f"{now:.3f}")
        pipe.hset(ck["size"], campaign, size - 1)  # the trigger itself is added as the first member
        pipe.hset(ck["seed"], campaign, json.dumps(bucket_list))
        add_event(client, self.keys.events, "campaign_start", data, ts=now, maxlen=self.events_maxlen, pipeline=pipe)
        pipe.execute()
        log.warning("campaign_start %s: %d near-duplicates from %d authors within %ds", campaign, size, n_authors,
                    self.window_s)
        return campaign

    def _record_members(self, client, comments, members: dict[int, str], dense: dict[int, str], now: float) -> None:
        ck = campaign_keys(self.keys)
        pipe = client.pipeline(transaction=False)
        for i, campaign in members.items():
            if i in dense:
                pipe.hset(self._bucket("lsh", dense[i]), "L", campaign)
        for campaign, count in Counter(members.values()).items():  # once per campaign and batch
            pipe.hincrby(ck["size"], campaign, count)
            pipe.hset(ck["last"], campaign, f"{now:.3f}")
        pipe.execute()

    def _bucket(self, kind: str, band_key: str) -> str:
        return self.keys.key("campaigns", kind, band_key)


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
