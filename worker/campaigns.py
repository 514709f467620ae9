"""Campaign detection in the comment path, shared by all workers through Redis.

A *campaign* is a family of near-duplicate comments that is new and bursty
against the site's own history and carries a second sign of coordination.
For each batch, :class:`CampaignPolicy`:

1. cuts every comment into the model's normalized tokens with one fixed
   tokenizer configuration (:data:`CAMPAIGN_TOKENIZER`: NFKC, look-alike
   letters, zero-width characters, leetspeak, spaced letters, link markers),
   whatever model the worker serves, so that spelling tricks cannot split a
   family and every worker computes the same shingles (when the served
   model's tokenizer cuts the same words, the worker hands over the words of
   its scoring pass, :class:`model.features.BatchWords`, instead);
2. computes their MinHash signatures and LSH band keys (:mod:`model.minhash`);
   a band key names a *bucket*, a family of comments that agree on that band;
3. reads what other workers saw since its last batch and the first sightings
   of the authors and sites it does not know yet (one round trip), finds which band keys were seen before in the
   window in its own copy of the recent sightings (:class:`Sightings`),
   groups the batch's hits by bucket (a bucket once per batch, with counts),
   and sends them with the batch's first sightings in one more round trip,
   one script call for every band (one per band on a Redis Cluster;
   :meth:`worker.campaignstore.CampaignStore.observe_bands`);
4. decides in the worker, from the buckets the store reports, which comments
   are campaign members.

With the default second signal (new authors) none of this needs the scores, so
the worker asks before scoring (:meth:`CampaignPolicy.will_hold`) and ranks the
members' reasons spam-ward in its one scoring pass.

The policy keeps its state through a :class:`worker.campaignstore.CampaignStore`
(the port; :class:`worker.campaignstore.RedisCampaignStore` is the Redis one,
and its module doc gives the key layout): it never sees a Redis client.

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

Writes are safe to repeat, as :mod:`worker.policies` requires: a redelivered
comment counts twice in its buckets, which can only bring a campaign forward
by one comment.  :meth:`worker.campaignstore.CampaignStore.end_idle` ends campaigns with no new
member for ``window_s`` (``campaign_end``).
"""
from __future__ import annotations

import hashlib
import json
import logging
import operator
import time
from collections import Counter
from collections.abc import Callable, Sequence

import numpy as np

from model.actions import Action
from model.features import BatchWords
from model.minhash import MinHasher, band_hashes
from model.params import flag, integer, one_of, real, set_params
from model.tokens import Tokenizer
from worker.campaignstore import (FIRST_IN_CUR, FIRST_IN_PREV, MEMBER, BandHits, BucketRules,
                                  CampaignStore, Observed, Window)
from worker.events import EVENTS_MAXLEN
from worker.routing import CAMPAIGN_RULE, Decision

log = logging.getLogger("seawall.worker.campaigns")

#: The one tokenizer configuration campaigns shingle with, whatever model a
#: worker serves: unigrams and markers after every evasion-undoing step.  A
#: change here (or in the normalization rules, which ``version`` pins) gives
#: the band state a new tag, so no two rules ever meet in one bucket.
CAMPAIGN_TOKENIZER = {"version": 1, "bigrams": False, "char_ngrams": (0, 0), "homoglyphs": True, "accents": True,
                      "leet": True, "join_spaced": True, "squash_repeats": True}

DAY_S = 86_400
_KNOWN_FLUSH = 4  # a bucket a worker knows linked has its hits counted once per this fraction of the window
_MAX_LEARNT_LINKS = 10_000  # linked buckets a worker remembers (a campaign links a few per template variant)
_MAX_KNOWN_AUTHORS = 200_000  # authors' first sightings a worker remembers (about 100 bytes each)
SIGNALS = ("either", "authors", "lean", "both")


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


def _fields(comments: Sequence, name: str) -> list[str]:
    """``[_get(c, name) for c in comments]``, in one pass of C calls when every comment holds the field as a
    str attribute (the worker's comments)."""
    if any(issubclass(t, dict) for t in set(map(type, comments))):
        return [_get(c, name) for c in comments]
    try:
        values = list(map(operator.attrgetter(name), comments))
    except AttributeError:
        return [_get(c, name) for c in comments]
    if values and set(map(type, values)) != {str}:
        return [_get(c, name) for c in comments]
    return values


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


class SortedKeys:
    """A batch's band keys (comments x bands) with one stable argsort of their flat places, which every
    membership test of the batch shares: sorted queries walk a sorted table once."""

    def __init__(self, keys: np.ndarray):
        self.keys = keys
        self.flat = keys.ravel()
        self.order = np.argsort(self.flat, kind="stable")
        self.ordered = self.flat[self.order]

    def places_in(self, table: np.ndarray) -> np.ndarray:
        """Where each key would go in ``table`` (sorted, not empty): ``np.searchsorted(table, keys)``, clipped to
        the last place, in the shape of the keys."""
        at = np.empty(self.flat.size, dtype=np.intp)
        at[self.order] = np.searchsorted(table, self.ordered)
        np.minimum(at, table.size - 1, out=at)
        return at.reshape(self.keys.shape)

    def isin(self, values: np.ndarray) -> np.ndarray:
        """``np.isin(keys, values)``."""
        if not values.size:
            return np.zeros(self.keys.shape, dtype=bool)
        table = np.sort(values)
        return table[self.places_in(table)] == self.keys


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
    sightings, 8 bytes a key.  Redis never tests membership: the worker does,
    on sorted numpy chunks (merged as they pile up, so a slot costs O(log n)
    searches).  Before each batch the worker reads what was appended since its
    last read (its offset into each list; a start or a new slot reads the
    whole list), skipping its own entries, so a key another worker saw in its
    last batch is a hit here.  A key two workers first see between that read
    and their appends, within a millisecond, is a first sighting for both: its
    bucket misses that one hit.
    """

    def __init__(self):
        # slot -> [sorted unique uint64 chunks, entries read from its list, places of this worker's own entries]
        self._slots: dict[int, list] = {}

    def offset(self, slot: int) -> int:
        """This worker's offset into the slot's list (0 for a slot it has not read yet: a start, a new slot)."""
        return self._slots.setdefault(slot, [[], 0, set()])[1]

    def find(self, slot: int, values: np.ndarray, order: np.ndarray | None = None) -> tuple[np.ndarray, int]:
        """Which ``values`` the slot has seen, and this worker's offset into the slot's list; ``order``, when
        given, is an argsort of ``values``."""
        for old in [s for s in self._slots if s < slot - 1]:
            del self._slots[old]
        chunks, offset, _own = self._slots.setdefault(slot, [[], 0, set()])
        found = np.zeros(values.size, dtype=bool)
        if chunks:
            if order is None:
                order = np.argsort(values)  # sorted queries: searches that walk each chunk once
            ordered = values[order]
            hit = np.zeros(values.size, dtype=bool)
            for chunk in chunks:
                at = np.searchsorted(chunk, ordered)
                np.minimum(at, chunk.size - 1, out=at)
                hit |= chunk[at] == ordered
            found[order] = hit
        return found, offset

    def add(self, slot: int, blobs, own: np.ndarray | None = None, *, place: int | None = None) -> None:
        """Add the list entries read from the worker's offset on (``blobs``), and this worker's own first
        sightings (``own``), appended to the list at ``place``, which a later read skips."""
        entry = self._slots.setdefault(slot, [[], 0, set()])
        mine = entry[2]
        read = [b for n, b in enumerate(blobs, entry[1]) if n not in mine]
        if mine and blobs:
            mine.difference_update(range(entry[1], entry[1] + len(blobs)))
        entry[1] += len(blobs)
        if place is not None:
            mine.add(place)
        parts = [np.frombuffer(b, dtype=">u8") for b in read] + ([own] if own is not None and own.size else [])
        if not parts:
            return
        chunks = entry[0]
        chunks.append(_sorted_unique(np.concatenate(parts).astype(np.uint64)))
        while len(chunks) > 1 and chunks[-2].size <= 2 * chunks[-1].size:
            last = chunks.pop()
            # two sorted runs: a stable sort merges them in linear time
            chunks[-1] = _sorted_unique(np.concatenate((chunks[-1], last)), kind="stable")


class PendingHits:
    """Per linked band key, the hits a worker kept to itself and when it last counted one: sorted numpy columns.

    The same contract as a dict ``key -> (hits left uncounted, last counted)``
    with ``(0, -inf)`` for a key it does not hold, but a whole batch's keys are
    looked up and stored in a few numpy calls (a flood brings a thousand
    distinct linked keys per batch; a dict costs a Python step for each).
    """

    def __init__(self):
        self.keys = np.zeros(0, dtype=np.uint64)
        self.hits = np.zeros(0, dtype=np.int64)
        self.last = np.zeros(0, dtype=float)

    def __len__(self) -> int:
        return int(self.keys.size)

    def _find(self, keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        at = np.searchsorted(self.keys, keys)
        found = at < self.keys.size
        found[found] = self.keys[at[found]] == keys[found]
        return at, found

    def get(self, keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """``(hits, last)`` of each of ``keys`` (sorted, distinct uint64)."""
        at, found = self._find(keys)
        hits = np.zeros(keys.size, dtype=np.int64)
        last = np.full(keys.size, -np.inf)
        hits[found] = self.hits[at[found]]
        last[found] = self.last[at[found]]
        return hits, last

    def put(self, keys: np.ndarray, hits: np.ndarray, last: np.ndarray) -> None:
        """Set ``(hits, last)`` of each of ``keys`` (sorted, distinct uint64)."""
        at, found = self._find(keys)
        self.hits[at[found]] = hits[found]
        self.last[at[found]] = last[found]
        new = ~found
        if new.any():  # sorted new keys, each inserted before the first larger held key
            self.keys = np.insert(self.keys, at[new], keys[new])
            self.hits = np.insert(self.hits, at[new], hits[new])
            self.last = np.insert(self.last, at[new], last[new])

    def keep(self, mask: np.ndarray) -> None:
        """Keep the keys where ``mask`` (over :attr:`keys`) is true."""
        self.keys, self.hits, self.last = self.keys[mask], self.hits[mask], self.last[mask]

    def clear(self) -> None:
        self.keep(np.zeros(self.keys.size, dtype=bool))


_NOT_OBSERVED = (False, False)  # (dense, qualifies) of a band key the batch's script call did not report


class CampaignPolicy:
    """A :class:`worker.policies.BatchPolicy` that finds campaigns (see the module doc).

    Parameters
    ----------
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

    def __init__(self, *, hasher: MinHasher, bands: int = 16, min_size: int = 10, min_authors: int = 3,
                 window_s: int = 600, min_words: int = 6, hold: bool = True, baseline_days: int = 7,
                 burst_ratio: float = 5.0, peak_ratio: float = 2.0, new_author_s: int = 3 * DAY_S,
                 warmup_s: int = DAY_S, new_author_share: float = 0.5, link_size: int = 3, lean_share: float = 0.5,
                 lean_quantile: float = 0.9, signals: str = "authors",
                 clock: Callable[[], float] = time.time, events_maxlen: int = EVENTS_MAXLEN):
        set_params(self, _PARAMS, locals())
        if hasher.num_perm % bands:
            raise ValueError(f"CampaignPolicy: bands {bands} must divide the signature length {hasher.num_perm}")
        self.hasher = hasher
        self.clock = clock
        self.events_maxlen = events_maxlen
        self.tokenizer = Tokenizer(**CAMPAIGN_TOKENIZER)
        self._word_params = self.tokenizer.word_params()
        self.tag = scheme_tag(hasher, bands)
        self.rules = BucketRules(min_size=min_size, link_size=link_size, min_authors=min_authors,
                                 peak_ratio=peak_ratio, burst_ratio=burst_ratio, window_s=window_s)
        self.site_scores = SiteScores(quantile=lean_quantile)
        # band key (uint64) -> (campaign, until): buckets this worker saw linked to a campaign.  A comment
        # with such a key is a member even when the bucket is not linked in the current slot yet, and its
        # other buckets are linked from link_size comments on, so the campaign follows its variants.
        self._links: dict[int, tuple[str, float]] = {}
        self._links_sorted: np.ndarray | None = None  # the keys of _links, sorted (None: to be rebuilt)
        self._links_added: list[int] = []  # keys learnt since _links_sorted was built, merged in at the next batch
        self._pending = PendingHits()  # linked band key -> (hits left uncounted, last counted)
        self._sightings = Sightings()
        self._purge_at = -np.inf
        # first sightings never change: (site, author) key -> epoch s, of this author generation; site -> epoch s
        self._first_seen: dict[bytes, int] = {}
        self._first_seen_generation = None
        self._site_since: dict[str, int] = {}
        self._since: float | None = None  # when the detector first ran with this scheme
        self._early: tuple | None = None  # (comments, members) will_hold found, for the apply of the same batch

    def will_hold(self, state, comments: Sequence, words: BatchWords | None = None) -> set[int]:
        """The batch's campaign members, found before scoring when the scores change nothing about them (the
        second signal is new authors only) and members are held; :meth:`apply` then uses what this found
        instead of observing the batch again.  (See :func:`worker.policies.held_before_scoring`.)

        ``words`` are the comments' words from the worker's scoring pass, used when its tokenizer cuts
        words as :data:`CAMPAIGN_TOKENIZER` does (see :meth:`band_keys`)."""
        self._early = None
        if not self.hold or self.signals != "authors" or not comments:
            return set()
        members = self.observe(state.campaigns, comments, None, words=words)
        # by object: the worker routes the same comment objects (fewer, if some are dead-lettered in between);
        # the tuple keeps them alive, so their ids stay theirs until apply
        self._early = (tuple(comments), members)
        return set(members)

    def apply(self, state, comments: Sequence, scores: Sequence[float], decisions: list[Decision]) -> list[Decision]:
        """Members the model would publish are held (rule ``campaign``); every member's decision names its campaign.

        ``state`` is the worker's :class:`worker.policies.PolicyState`; its ``campaigns`` is the store.
        """
        members = self._early_members(comments)
        if members is None:
            members = self.observe(state.campaigns, comments, scores)
        if not members:
            return list(decisions)
        out = list(decisions)
        shared: dict[tuple, Decision] = {}  # a Decision is immutable: one per (action, rule, campaign)
        for i, campaign in members.items():
            d = out[i]
            if self.hold and d.action == Action.PUBLISH:
                key = (Action.HOLD, CAMPAIGN_RULE, campaign)
            else:
                key = (d.action, d.rule, campaign)
            decision = shared.get(key)
            if decision is None:
                decision = shared[key] = Decision(*key)
            out[i] = decision
        return out

    def _early_members(self, comments: Sequence) -> dict[int, str] | None:
        """The members :meth:`will_hold` found, by place in ``comments``, when it saw every one of them; else None."""
        early, self._early = self._early, None
        if early is None:
            return None
        seen, members = early
        if len(comments) == len(seen) and all(map(operator.is_, comments, seen)):  # the same batch, in order
            return members
        place = {id(c): i for i, c in enumerate(seen)}
        if not all(id(c) in place for c in comments):
            return None
        return {i: members[place[id(c)]] for i, c in enumerate(comments) if place[id(c)] in members}

    def window(self, now: float) -> Window:
        """The state a batch at ``now`` touches: its slot and its history and author generations."""
        return Window(tag=self.tag, slot=int(now // (self.window_s / 2.0)),
                      history=int(now // (self.baseline_days * DAY_S)),
                      generation=int(now // self._author_generation_s()))

    def _author_generation_s(self) -> int:
        # an author is remembered for one to two generations after their last comment
        return max(self.new_author_s, 30 * DAY_S)

    # -- the batch -------------------------------------------------------------------------

    def observe(self, store: CampaignStore, comments: Sequence,
                scores: Sequence[float] | None = None, *, words: BatchWords | None = None) -> dict[int, str]:
        """Record the batch in the shared state; return ``{index: campaign id}`` of campaign members.

        ``scores`` are the model's spam probabilities of ``comments`` (or None):
        they feed the spam-ward lean signal.  ``words``: see :meth:`band_keys`.
        """
        if not comments:
            return {}
        now = self.clock()
        texts = _fields(comments, "text")
        sites = _fields(comments, "site")
        if scores is not None and len(scores) != len(comments):
            raise ValueError(f"campaigns: {len(scores)} scores for {len(comments)} comments")
        eligible, keys = self.band_keys(texts, words)
        batch = SortedKeys(keys)  # one sort serves the first places and every membership test of the batch
        flat, order, ordered = batch.flat, batch.order, batch.ordered
        starts = np.ones(ordered.size, dtype=bool)
        np.not_equal(ordered[1:], ordered[:-1], out=starts[1:])
        first_places = order[starts]  # each distinct key's first place, in key order (as np.unique gives them)
        repeated = np.ones(flat.size, dtype=bool)  # the key occurs earlier in the batch
        repeated[first_places] = False
        window = self.window(now)
        slot = window.slot
        names = _fields(comments, "author")
        authors = list(map(author_key, sites, names, _fields(comments, "id")))
        if window.generation != self._first_seen_generation or len(self._first_seen) > _MAX_KNOWN_AUTHORS:
            self._first_seen, self._first_seen_generation = {}, window.generation
        # a comment with no author is its own author, first seen now: nothing to look up or keep
        ask = [a for a in dict.fromkeys(a for a, name in zip(authors, names) if name) if a not in self._first_seen]
        ask_sites = [s for s in dict.fromkeys(sites) if s not in self._site_since]
        opening = store.open_batch(window, now=now, offsets=(self._sightings.offset(slot),
                                                             self._sightings.offset(slot - 1)),
                                   authors=b"".join(ask), sites=ask_sites, author_ttl=2 * self._author_generation_s(),
                                   since=self._since is None, active=bool(self._links))
        if opening.since is not None:  # the scheme's start never changes: read once
            self._since = opening.since
        self._first_seen.update(zip(ask, opening.first_seen))
        self._site_since.update(opening.site_since)
        self._sightings.add(slot, opening.sightings[0])
        self._sightings.add(slot - 1, opening.sightings[1])
        in_cur, _ = self._sightings.find(slot, flat, order)
        in_prev, _ = self._sightings.find(slot - 1, flat, order)
        hit = repeated | in_cur | in_prev
        known, skip, weights = self._known_members(batch, hit, now)
        hit[skip] = False  # hits this worker leaves uncounted
        firsts = flat[first_places[~in_cur[first_places]]]  # first sightings in this slot, once each
        history_s = max(now - max(self._since, self._history_start(now)) - self.window_s, float(self.window_s))
        observed = Observed()
        if hit.any() or firsts.size:
            lean = self._lean_rows(eligible, sites, scores)
            member = np.zeros(eligible.size, dtype=bool)
            member[list(known)] = True
            bands = self._band_hits(keys, hit, weights, repeated, in_cur, in_prev,
                                    fresh=self._new_authors(eligible, authors, names, sites, now),
                                    lean=lean, member=member,
                                    authors=np.frombuffer(b"".join(authors), dtype=">u8")[eligible])
            slot_s = self.window_s / 2.0
            slot_ttl = max(1, int((slot + 2) * slot_s - now) + 1)  # relative: the server's clock may differ
            observed = store.observe_bands(window, rules=self.rules, history_s=history_s, slot_ttl=slot_ttl,
                                           history_ttl=2 * self.baseline_days * DAY_S + 3600,
                                           firsts=firsts.astype(">u8").tobytes(),
                                           bands=bands)
            self._sightings.add(slot, [], firsts, place=observed.place)
        members = self._decide(store, window, comments, eligible, batch, known, opening.active, observed,
                               history_s, now)
        if scores is not None and self.signals != "authors":
            plain = [i for i in range(len(comments)) if i not in members]
            self.site_scores.add([sites[i] for i in plain], [float(scores[i]) for i in plain])
        return members

    def _new_authors(self, eligible: np.ndarray, authors: list[bytes], names: list[str], sites: list[str],
                     now: float) -> np.ndarray:
        """Which rows are by an author new to the site: first seen less than ``new_author_s`` ago, and after
        the site's warm-up (the first ``warmup_s`` after the detector first saw the site, while everyone it
        sees is a first sighting)."""
        now_s = int(now // 1)
        out = np.zeros(eligible.size, dtype=bool)
        for row, i in enumerate(eligible.tolist()):
            first = self._first_seen.get(authors[i], now_s) if names[i] else now_s
            out[row] = first >= max(now - self.new_author_s, self._site_since.get(sites[i], now_s) + self.warmup_s)
        return out

    def _band_hits(self, keys: np.ndarray, hit: np.ndarray, weights: dict[int, int], repeated: np.ndarray,
                   in_cur: np.ndarray, in_prev: np.ndarray, *, fresh: np.ndarray, lean: np.ndarray,
                   member: np.ndarray, authors: np.ndarray) -> list[BandHits]:
        """The batch's hits grouped by bucket, per band: each bucket once, with its counts and distinct authors.

        ``keys`` is (rows x bands); ``hit`` and the flags are over its flat
        places; ``weights`` the hits that stand for others (1-based places);
        ``fresh``, ``lean``, ``member`` and ``authors`` are per row.  Each bucket names its first
        ``min_authors`` distinct authors.
        """
        places = np.flatnonzero(hit)
        if not places.size:
            return []
        flat = keys.ravel()
        rows = places // self.bands
        w = np.ones(places.size, dtype=np.int64)
        if weights:
            w = np.fromiter((weights.get(p, 1) for p in (places + 1).tolist()), dtype=np.int64, count=places.size)
        uniq, first, inverse = np.unique(flat[places], return_index=True, return_inverse=True)
        inverse = inverse.ravel()
        n = uniq.size
        counts = np.bincount(inverse, weights=w, minlength=n).astype(np.int64)
        new = np.bincount(inverse, weights=w * fresh[rows], minlength=n).astype(np.int64)
        leaning = np.bincount(inverse, weights=w * lean[rows], minlength=n).astype(np.int64)
        members = np.bincount(inverse, weights=member[rows], minlength=n) > 0
        fp = places[first]  # each bucket's first hit (places are in order)
        flags = (members * MEMBER + in_prev[fp] * FIRST_IN_PREV
                 + (in_cur[fp] | repeated[fp]) * FIRST_IN_CUR).astype(np.int64)
        band_of = fp % self.bands
        # each bucket's distinct authors, in the order they hit it
        au = authors[rows].astype(np.uint64)
        order = np.lexsort((np.arange(places.size), au, inverse))
        a_sorted, i_sorted = au[order], inverse[order]
        distinct = np.ones(order.size, dtype=bool)
        distinct[1:] = (a_sorted[1:] != a_sorted[:-1]) | (i_sorted[1:] != i_sorted[:-1])
        chosen = order[distinct]
        chosen = chosen[np.lexsort((chosen, inverse[chosen]))]
        # min_authors of them are enough: a bucket short of min_authors has fewer recorded, so these include
        # as many unrecorded ones as it lacks
        group = inverse[chosen]
        starts = np.flatnonzero(np.r_[True, group[1:] != group[:-1]]) if group.size else np.zeros(0, dtype=np.int64)
        rank = np.arange(group.size) - np.repeat(starts, np.diff(np.r_[starts, group.size]))
        chosen = chosen[rank < self.min_authors]
        per_bucket = np.bincount(inverse[chosen], minlength=n)
        blob = au[chosen].astype(">u8").tobytes()
        ends = np.cumsum(per_bucket) * 8
        author_blobs = [blob[e - 8 * c:e] for e, c in zip(ends.tolist(), per_bucket.tolist())]
        out = []
        for band in np.unique(band_of).tolist():
            sel = np.flatnonzero(band_of == band)
            out.append(BandHits(band=band, keys=uniq[sel], counts=counts[sel], new=new[sel], lean=leaning[sel],
                                flags=flags[sel], authors=[author_blobs[s] for s in sel.tolist()]))
        return out


    def band_keys(self, texts: Sequence[str], words: BatchWords | None = None) -> tuple[np.ndarray, np.ndarray]:
        """The comments with at least ``min_words`` normalized words, and their LSH band keys.

        Returns their indices in ``texts`` and a ``(len(indices), bands)``
        uint64 array: the MinHash bands of word shingles of the tokens of
        :data:`CAMPAIGN_TOKENIZER`, the same on every worker.  ``words``, the
        texts' words as another pass cut them, stand in for cutting them again
        when that pass's tokenizer has the word parameters of
        :data:`CAMPAIGN_TOKENIZER` (it then cuts the same words); otherwise
        they are ignored.
        """
        if words is not None and len(words.counts) == len(texts) and words.params == self._word_params:
            flat, counts = words.flat, np.asarray(words.counts, dtype=np.int64)
        else:
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


    def _decide(self, store: CampaignStore, window: Window, comments, eligible, batch: SortedKeys,
                known: dict[int, str], active: set[str] | None, observed: Observed, history_s: float,
                now: float) -> dict[int, str]:
        if not observed.buckets and not known and not observed.linked:  # the usual batch: nothing dense and bursty
            return {}
        keys = batch.keys
        # read with the batch when this worker knows links (it will need them), else only now
        active = set(active) if active is not None else store.active_campaigns()
        members: dict[int, str] = {}
        for row, campaign in known.items():
            if campaign in active:
                members[int(eligible[row])] = campaign
            else:  # ended: forget its buckets
                self._links = {k: v for k, v in self._links.items() if v[0] != campaign}
                self._links_sorted = None
        linked: dict[int, str] = {}  # band keys linked to an active campaign, as the store has them
        for key, campaign in observed.linked.items():
            if campaign in active:
                linked[key] = campaign
                self._learn(key, campaign, now)
        if linked:
            on_link = batch.isin(np.fromiter(linked, dtype=np.uint64, count=len(linked)))
            for row in np.flatnonzero(on_link.any(axis=1)).tolist():
                members.setdefault(int(eligible[row]), linked[int(keys[row][on_link[row]][0])])
        figures = observed.buckets  # band key -> (band, members, authors, new hits, lean hits, history, peak)
        # (dense, qualifies) of each bucket: qualifying buckets are bursty and carry the second signal
        flags = {key: self._bucket_flags(t, a, w, h, e, m, history_s)
                 for key, (_band, t, a, w, h, e, m) in figures.items()}
        on_bucket = batch.isin(np.fromiter(flags, dtype=np.uint64, count=len(flags))) if flags else None
        links: dict[tuple[int, int], str] = {}  # (band, band key) this batch links, with their campaign
        linked_now: dict[int, str] = {}
        seeds: dict[str, set[str]] | None = None  # campaign -> its first member's band keys, read when needed
        rows = np.flatnonzero(on_bucket.any(axis=1)).tolist() if on_bucket is not None else []
        eligible_list = eligible.tolist()
        for row in rows:
            i = eligible_list[row]
            row_keys = keys[row]
            row_list = row_keys.tolist()
            # (band, band key) of buckets that could start or extend a campaign
            qualifying = [(band, key) for band, key in enumerate(row_list) if flags.get(key, _NOT_OBSERVED)[1]]
            campaign = members.get(i) or next((linked_now[k] for k in row_list if k in linked_now), None)
            if campaign is None:
                starters = [q for q in qualifying if flags[q[1]][0]]
                if not starters:
                    continue
                band, key = max(starters, key=lambda q: (figures[q[1]][1], figures[q[1]][2]))
                facts = self._bucket_facts(*figures[key][1:], history_s)
                bucket_list = [f"{int(k):016x}" for k in row_keys]
                if seeds is None:
                    seeds = store.load_seeds()
                campaign = self._campaign_of_seeds(bucket_list, active, seeds)
                if campaign is None:
                    earlier = facts["members"] - int((keys == row_keys[band]).any(axis=1).sum())
                    campaign = self._start(store, window, comments[i], band, int(row_keys[band]), bucket_list,
                                           facts, max(0, earlier), now)
                    active.add(campaign)
                    seeds[campaign] = set(bucket_list)
            members[i] = campaign
            for band, key in qualifying:
                # only a bucket that is bursty and new-authored (or spam-ward) itself, with link_size
                # comments, joins the campaign: linking every bucket of every member would chain
                # merely similar comments into it (a format the campaign imitates, for one)
                links[(band, key)] = campaign
                linked_now[key] = campaign
                self._learn(key, campaign, now)
        if members:
            store.record_members(window, links=links, sizes=dict(Counter(members.values())), now=now)
        return members

    def _bucket_flags(self, total: int, n_authors: int, new_hits: int, lean_hits: int, history: int, peak: int,
                      history_s: float) -> tuple[bool, bool]:
        """``(dense, qualifies)`` of one bucket, as :meth:`_bucket_facts` decides them: qualifies is bursty
        and carrying the second signal.  Called for every bucket a batch observes, so it builds nothing."""
        dense = total >= self.min_size and n_authors >= self.min_authors
        if total < self.burst_ratio * (history * self.window_s / history_s) or total < self.peak_ratio * peak:
            return dense, False
        by_authors = (new_hits / total if total else 0.0) >= self.new_author_share
        by_lean = (lean_hits / total if total else 0.0) >= self.lean_share
        signals = self.signals
        if signals == "either":
            return dense, by_authors or by_lean
        if signals == "authors":
            return dense, by_authors
        if signals == "lean":
            return dense, by_lean
        return dense, by_authors and by_lean

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

    def _known_members(self, batch: SortedKeys, hit: np.ndarray,
                       now: float) -> tuple[dict[int, str], np.ndarray, dict[int, int]]:
        """Rows of ``batch.keys`` (comments x bands) with a band key this worker saw linked, as ``{row: campaign}``;
        then which of those keys' hits (``hit``, over the flat places) the batch leaves uncounted and which
        count for several (``{1-based place: hits it stands for}``).

        A learnt link is trusted for one window after the bucket was last seen
        linked: a campaign whose buckets are no longer linked (no longer bursty
        against their history) fades out of a worker's memory.  In a flood most
        comments are such members: a worker keeps a linked bucket's hits to
        itself and counts them once per quarter window (one hit standing for
        all it kept), so the bucket's figures and link stay alive from slot to
        slot at a fraction of the Redis work; the members are counted in their
        campaign each batch all the same.
        """
        keys = batch.keys
        if not self._links or not keys.size:
            return {}, np.zeros(0, dtype=np.int64), {}
        if now >= self._purge_at:  # forget expired links now and then, not every batch
            self._links = {k: v for k, v in self._links.items() if v[1] > now}
            self._links_sorted = None
            self._purge_at = now + self.window_s / 4.0
        if not self._links:
            self._pending.clear()
            return {}, np.zeros(0, dtype=np.int64), {}
        if self._links_sorted is None:  # rebuilt when a link goes, not when a known one is refreshed
            self._links_sorted = np.sort(np.fromiter(self._links, dtype=np.uint64, count=len(self._links)))
            self._links_added.clear()
        elif self._links_added:  # a flood learns a few dozen links a batch: merged, not rebuilt
            added = np.unique(np.array(self._links_added, dtype=np.uint64))
            at = np.searchsorted(self._links_sorted, added)
            held = at < self._links_sorted.size
            held[held] = self._links_sorted[at[held]] == added[held]
            # np.union1d without sorting the held keys again: each new key goes before the first larger one
            self._links_sorted = np.insert(self._links_sorted, at[~held], added[~held])
            self._links_added.clear()
        learnt = self._links_sorted[batch.places_in(self._links_sorted)] == keys
        rows = np.flatnonzero(learnt.any(axis=1))
        first_learnt = keys[rows, learnt[rows].argmax(axis=1)].tolist()
        known = {r: self._links[k][0] for r, k in zip(rows.tolist(), first_learnt)}
        counted = learnt.ravel() & hit  # a first sighting is no hit: it neither counts nor waits
        places = batch.order[counted[batch.order]]  # grouped by key, in arrival order within a key
        grouped = keys.ravel()[places]  # sorted: each key's run starts where the key changes
        edge = np.ones(grouped.size, dtype=bool)
        np.not_equal(grouped[1:], grouped[:-1], out=edge[1:])
        starts = np.flatnonzero(edge)
        uniq = grouped[starts]
        counts = np.diff(np.append(starts, grouped.size))
        pending, last = self._pending.get(uniq)
        stale = now - last >= self.window_s / _KNOWN_FLUSH
        # a stale key counts its first hit at once, standing for what was pending and for the batch's other
        # hits of it; the others are kept until their key is stale
        kept = np.zeros(places.size, dtype=bool)
        kept[starts[stale]] = True
        weight = np.zeros(places.size, dtype=np.int64)
        weight[starts[stale]] = pending[stale] + counts[stale]
        self._pending.put(uniq, np.where(stale, 0, pending + counts), np.where(stale, now, last))
        if len(self._pending) > 2 * len(self._links):
            self._pending.keep(np.isin(self._pending.keys, self._links_sorted))
        weights = {p: w for p, w in zip((places[kept] + 1).tolist(), weight[kept].tolist()) if w > 1}
        return known, places[~kept], weights

    def _learn(self, band_key: int, campaign: str, now: float) -> None:
        if len(self._links) >= _MAX_LEARNT_LINKS:
            self._links.clear()
            self._links_sorted = None
        if band_key not in self._links:
            self._links_added.append(band_key)
        self._links[band_key] = (campaign, now + self.window_s)


    @staticmethod
    def _campaign_of_seeds(bucket_list: list[str], active: set[str], seeds: dict[str, set[str]]) -> str | None:
        """The active campaign whose first member shares a band key with this comment, if any.

        Variants of one template that fill different buckets at the same
        moment (a burst) then join one campaign instead of announcing several.
        """
        mine = set(bucket_list)
        return next((c for c, keys in seeds.items() if c in active and keys & mine), None)

    def _start(self, store: CampaignStore, window: Window, comment, band: int, band_key: int,
               bucket_list: list[str], facts: dict, earlier: int, now: float) -> str:
        """Announce a campaign (once: the link on its bucket decides which worker does); ``earlier`` near-
        duplicates came before this batch, whose members the batch's record counts."""
        campaign = "c" + hashlib.blake2b(f"{band_key:016x}:{int(now)}".encode(), digest_size=6).hexdigest()
        winner = store.link_bucket(window, band, band_key, campaign)
        if winner != campaign:  # another worker announced this bucket first
            return winner
        data = {"id": campaign, "site": _get(comment, "site")[:200], "members": facts["members"],
                "authors": facts["authors"], "new_share": facts["new_share"], "lean_share": facts["lean_share"],
                "expected": facts["expected"], "signals": facts["by"], "window_s": self.window_s,
                "started": round(now, 3), "example_id": _get(comment, "id")[:200]}
        store.start_campaign(campaign, data, bucket_list, earlier, now=now, events_maxlen=self.events_maxlen)
        log.warning("campaign_start %s: %d near-duplicates from %d+ authors within %ds (%.2f expected), new-author "
                    "share %.2f, spam-ward share %.2f", campaign, facts["members"], facts["authors"], self.window_s,
                    facts["expected"], facts["new_share"], facts["lean_share"])
        return campaign
