"""Near-duplicate campaign detection in the comment path, shared by all workers.

For each batch, :class:`CampaignPolicy` computes the MinHash signatures of the
comments (:mod:`model.minhash`) and adds each comment to the LSH bucket of each
of its bands, in Redis, so that a template posted through many workers meets in
the same buckets.  Per bucket Redis keeps, for the last ``window_s`` seconds:

* ``campaigns:lsh:{band}:{key}``: sorted set of comment ids, scored by time;
* ``campaigns:authors:{band}:{key}``: sorted set of author hashes (never the
  author id itself), scored by time;
* ``campaigns:link:{band}:{key}``: the campaign the bucket belongs to, if any;
* ``campaigns:member:{comment id}``: the campaign a comment was counted in;
* ``campaigns:seed``: per active campaign, its first member's band keys.

All three expire ``window_s`` after their last write.  A bucket that holds at
least ``min_size`` comments from at least ``min_authors`` distinct authors
within the window starts a campaign (one ``campaign_start`` event: the
``SET NX`` on the bucket's link decides which worker announces it).  Later
comments that land in any bucket linked to an active campaign are its members;
another bucket of a member that is dense itself (N comments, M authors) is
linked too, so the campaign follows the template's variations without
chaining in comments that are merely similar to a member.  With ``hold=True`` members the model would publish are held for
review: this catches a new wave before the nightly retrain has learned it.

Writes are safe to repeat (a redelivered comment re-adds the same member with
a new time), as :mod:`worker.policies` requires.  :func:`end_idle_campaigns`
ends campaigns with no new member for ``window_s`` (``campaign_end``).
"""
from __future__ import annotations

import hashlib
import json
import logging
import time
from collections.abc import Callable, Sequence

from model.minhash import MinHasher, band_keys
from worker.events import EVENTS_MAXLEN, add_event
from worker.settings import Keys

log = logging.getLogger("seawall.worker.campaigns")

# Adds every comment to its bands' buckets, trims and refreshes them, and
# reports per comment the fullest bucket (size, distinct authors, band) and the
# campaigns its buckets are linked to.  KEYS: per comment and band, the lsh,
# authors and link keys.  ARGV: now, cutoff, ttl, bands, then (member, author)
# per comment.
_ADD_SCRIPT = """
local now, cutoff, ttl, bands = ARGV[1], '(' .. ARGV[2], tonumber(ARGV[3]), tonumber(ARGV[4])
local out = {}
local n = (#ARGV - 4) / 2
for i = 0, n - 1 do
  local member, author = ARGV[5 + 2 * i], ARGV[6 + 2 * i]
  local best_size, best_authors, best_band = 0, 0, -1
  local links = {}
  for j = 0, bands - 1 do
    local base = (i * bands + j) * 3
    local lsh, auth, link = KEYS[base + 1], KEYS[base + 2], KEYS[base + 3]
    redis.call('ZADD', lsh, now, member)
    redis.call('ZADD', auth, now, author)
    redis.call('ZREMRANGEBYSCORE', lsh, '-inf', cutoff)
    redis.call('ZREMRANGEBYSCORE', auth, '-inf', cutoff)
    redis.call('EXPIRE', lsh, ttl)
    redis.call('EXPIRE', auth, ttl)
    local size = redis.call('ZCARD', lsh)
    local na = redis.call('ZCARD', auth)
    if size > best_size or (size == best_size and na > best_authors) then
      best_size, best_authors, best_band = size, na, j
    end
    local l = redis.call('GET', link)
    if l then table.insert(links, l) end
  end
  table.insert(out, {best_size, best_authors, best_band, links})
end
return out
"""

# Recent members of a newly dense bucket looked up to find the campaign they already belong to.
MEMBER_SAMPLE = 10

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

    def apply(self, client, comments: Sequence, scores: Sequence[float], actions: list[str]) -> list[str]:
        members = self.observe(client, comments)
        if not self.hold:
            return list(actions)
        return ["hold" if i in members and a == "publish" else a for i, a in enumerate(actions)]

    def observe(self, client, comments: Sequence) -> dict[int, str]:
        """Record the batch in the shared buckets; return ``{index: campaign id}`` of campaign members."""
        words = [self.hasher.words(_get(c, "text")) for c in comments]
        eligible = [i for i, w in enumerate(words) if len(w) >= self.min_words]
        if not eligible:
            return {}
        now = self.clock()
        signatures = self.hasher.signatures_of_words([words[i] for i in eligible])
        buckets = [band_keys(sig, self.bands) for sig in signatures]
        script_keys, argv = [], [f"{now:.3f}", f"{now - self.window_s:.3f}", str(self.window_s), str(self.bands)]
        for i, bucket_list in zip(eligible, buckets):
            for b in bucket_list:
                script_keys += [self._bucket("lsh", b), self._bucket("authors", b), self._bucket("link", b)]
            cid = _get(comments[i], "id")
            argv += [cid, author_hash(_get(comments[i], "author"), cid)]
        if self._script is None:
            self._script = client.register_script(_ADD_SCRIPT)
        reply = self._script(keys=script_keys, args=argv, client=client)

        ck = campaign_keys(self.keys)
        active = {_text(k) for k in client.hkeys(ck["active"])}
        members: dict[int, str] = {}
        new_links: dict[str, str] = {}
        dense: dict[int, str] = {}  # comment index -> its fullest bucket, when that bucket meets N and M
        in_batch: dict[str, str] = {}  # comment id -> campaign, for members not yet written
        seeds: dict[str, set[str]] | None = None  # campaign -> its first member's band keys, read when needed
        for i, bucket_list, (size, n_authors, best_band, links) in zip(eligible, buckets, reply):
            linked = [_text(x) for x in links] + [new_links[b] for b in bucket_list if b in new_links]
            campaign = next((c for c in linked if c in active), None)
            is_dense = size >= self.min_size and n_authors >= self.min_authors
            if campaign is None and is_dense:
                best = bucket_list[int(best_band)]
                campaign = self._campaign_of_members(client, best, active, in_batch)
                if campaign is None:
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
            in_batch[_get(comments[i], "id")] = campaign
            if is_dense:
                # Only a bucket that itself holds N near-duplicates from M authors joins the campaign:
                # linking every bucket of every member would chain merely similar comments into it.
                dense[i] = bucket_list[int(best_band)]
                new_links[dense[i]] = campaign
        if members:
            self._record_members(client, comments, members, dense, now)
        return members

    def _campaign_of_members(self, client, bucket: str, active: set[str], in_batch: dict[str, str]) -> str | None:
        """The active campaign that recent members of a newly dense bucket already belong to, if any.

        A template's variants fill several buckets; the second bucket to fill
        joins the first one's campaign instead of announcing another.
        """
        recent = client.zrevrange(self._bucket("lsh", bucket), 0, MEMBER_SAMPLE - 1)
        if not recent:
            return None
        local = [in_batch[_text(m)] for m in recent if _text(m) in in_batch]
        found = local + client.mget([self.keys.key("campaigns", "member", _text(m)) for m in recent])
        return next((_text(c) for c in found if c is not None and _text(c) in active), None)

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
        link = self._bucket("link", bucket)
        if not client.set(link, campaign, nx=True, ex=self.window_s):
            other = client.get(link)
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
                pipe.set(self._bucket("link", dense[i]), campaign, ex=self.window_s)
            pipe.set(self.keys.key("campaigns", "member", _get(comments[i], "id")), campaign, ex=self.window_s)
            pipe.hincrby(ck["size"], campaign, 1)
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
