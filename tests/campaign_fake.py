"""An in-memory :class:`worker.campaignstore.CampaignStore`: the campaign policy's port without Redis.

It keeps the same figures as the Redis scripts (written again in plain
Python from the contract in worker/campaignstore.py), so a test can drive the
policy through it and compare with the Redis store.  Expiry is not modelled:
the tests that use it stay within a few slots.
"""
from __future__ import annotations

import json

from worker.campaignstore import FIRST_IN_CUR, FIRST_IN_PREV, MEMBER, Observed, Opening


class MemoryCampaignStore:
    def __init__(self):
        self.sightings: dict[tuple[str, int], list[bytes]] = {}
        self.authors: dict[int, dict[bytes, int]] = {}
        self.sites: dict[str, int] = {}
        self.since: dict[str, int] = {}
        self.buckets: dict[tuple[str, int, int], dict] = {}   # (tag, band, slot) -> band key -> figures
        self.history: dict[tuple[str, int, int], dict] = {}   # (tag, band, generation) -> band key -> (sum, peak)
        self.active: dict[str, dict] = {}
        self.size: dict[str, int] = {}
        self.last: dict[str, float] = {}
        self.seed: dict[str, list[str]] = {}
        self.events: list[tuple[str, dict]] = []

    # -- the batch -------------------------------------------------------------------------

    def open_batch(self, window, *, now, offsets, authors, sites, author_ttl, since=True, active=True):
        cur = self.sightings.get((window.tag, window.slot), [])
        prev = self.sightings.get((window.tag, window.slot - 1), [])
        got = (list(cur[offsets[0]:]), list(prev[offsets[1]:]))
        here = self.authors.setdefault(window.generation, {})
        before = self.authors.get(window.generation - 1, {})
        first_seen = []
        for n in range(len(authors) // 8):
            a = authors[8 * n:8 * n + 8]
            if a not in here:
                here[a] = before.get(a, int(now))
            first_seen.append(here[a])
        site_since = {site: self.sites.setdefault(site, int(now)) for site in sites}
        start = self.since.setdefault(window.tag, int(now))
        return Opening(since=float(start) if since else None, active=set(self.active) if active else None,
                       sightings=got, first_seen=first_seen, site_since=site_since)

    def active_campaigns(self):
        return set(self.active)

    def observe_bands(self, window, *, rules, history_s, slot_ttl, history_ttl, firsts, bands):
        cur = self.sightings.setdefault((window.tag, window.slot), [])
        out = Observed()
        if firsts:
            cur.append(firsts)
            out.place = len(cur) - 1
        for hits in bands:
            here = self.buckets.setdefault((window.tag, hits.band, window.slot), {})
            before = self.buckets.get((window.tag, hits.band, window.slot - 1), {})
            hist = self.history.setdefault((window.tag, hits.band, window.history), {})
            older = self.history.get((window.tag, hits.band, window.history - 1), {})
            for n, key in enumerate(hits.keys.tolist()):
                flags = int(hits.flags[n])
                s = here.get(key)
                if s is None:
                    hs, hp = hist.get(key, (0, 0))
                    gs, gp = older.get(key, (0, 0))
                    s = {"e": hs + gs, "m": max(hp, gp), "t": 0, "w": 0, "h": 0, "a": 0, "c": False, "L": None,
                         "authors": set()}
                    p = before.get(key)
                    if p is not None:
                        s["t"], s["w"], s["h"] = p["t"] - p["p"], p["w"] - p["x"], p["h"] - p["y"]
                        campaign_window = p["L"] is not None or p["c"]
                        hist[key] = (hs + s["t"], hp if campaign_window else max(hp, p["t"]))
                    elif flags & FIRST_IN_PREV:
                        s["t"] = 1
                    s["p"], s["x"], s["y"] = s["t"], s["w"], s["h"]
                    if flags & FIRST_IN_CUR:
                        s["t"] += 1
                    here[key] = s
                s["t"] += int(hits.counts[n])
                s["w"] += int(hits.new[n])
                s["h"] += int(hits.lean[n])
                member = bool(flags & MEMBER)
                s["c"] = s["c"] or member
                blob = hits.authors[n]
                for q in range(len(blob) // 8):
                    if s["a"] >= rules.min_authors:
                        break
                    if blob[8 * q:8 * q + 8] not in s["authors"]:
                        s["authors"].add(blob[8 * q:8 * q + 8])
                        s["a"] += 1
                if s["L"] is not None:
                    out.linked[key] = s["L"]
                elif (s["t"] >= (rules.link_size if member else rules.min_size) and s["t"] >= rules.peak_ratio * s["m"]
                      and s["t"] * history_s >= rules.burst_ratio * s["e"] * rules.window_s):
                    out.buckets[key] = (hits.band, s["t"], s["a"], s["w"], s["h"], s["e"], s["m"])
        return out

    # -- campaigns -------------------------------------------------------------------------

    def _bucket(self, window, band, key):
        return self.buckets.setdefault((window.tag, band, window.slot), {}).setdefault(
            key, {"e": 0, "m": 0, "t": 0, "p": 0, "w": 0, "x": 0, "h": 0, "y": 0, "a": 0, "c": False, "L": None,
                  "authors": set()})

    def link_bucket(self, window, band, key, campaign):
        s = self._bucket(window, band, key)
        if s["L"] is None:
            s["L"] = campaign
        return s["L"]

    def start_campaign(self, campaign, data, seeds, earlier, *, now, events_maxlen=0):
        self.active[campaign] = json.loads(json.dumps(data))
        self.size[campaign] = earlier
        self.last[campaign] = now
        self.seed[campaign] = list(seeds)
        self.events.append(("campaign_start", data))

    def record_members(self, window, *, links, sizes, now):
        for (band, key), campaign in links.items():
            self._bucket(window, band, key)["L"] = campaign
        for campaign, count in sizes.items():
            self.size[campaign] = self.size.get(campaign, 0) + count
            self.last[campaign] = now

    def load_seeds(self):
        return {c: set(s) for c, s in self.seed.items()}

    def end_idle(self, *, now, window_s, events_maxlen=0):
        ended = []
        for campaign, seen in list(self.last.items()):
            if now - seen < window_s:
                continue
            start = self.active.pop(campaign, {})
            data = {"id": campaign, "site": start.get("site", ""), "members": self.size.pop(campaign, 0),
                    "started": start.get("started"), "last_seen": round(seen, 3)}
            del self.last[campaign]
            self.seed.pop(campaign, None)
            self.events.append(("campaign_end", data))
            ended.append(data)
        return ended

    def read_active(self):
        return {c: {**d, "members": self.size.get(c, 0), "last_seen": self.last.get(c)} for c, d in self.active.items()}
