"""What the console's tests share: hostile comments, the sites that hold them, and a quick hold queue.

Hostile comments (script tags, ``javascript:`` links, an image with an error handler, bidi overrides, a
64 KiB text, markup in the author and the site name) are sent through the real worker to sandbox sites whose
threshold holds everything, so the console shows them exactly as the worker cached them.
"""
from __future__ import annotations

import contextlib
import json
import time

from kit import wait_until
from worker.holdqueue import read_held
from worker.settings import Keys

NOW = 1_800_000_000.0
SANDBOX = "sandbox.example"
HOSTILE_SITE = 'yard"><script>window.__seawall_pwned=4</script>.example'
PWNED = "__seawall_pwned"
BIDI = "Lovely photos \u202egnp.exe\u202c and \u2066isolated\u2069 text"
LONG_TEXT = ("Our allotment diary, week by week. " * 2000)[:65_536]  # 64 KiB, the worker's limit
HOSTILE = {
    "x-script": f"<script>window.{PWNED} = 1</script> Great photos of the harbour!",
    "x-link": f'<a href="javascript:window.{PWNED}=2">claim your prize</a> or paste javascript:window.{PWNED}=2',
    "x-img": f'<img src=x onerror="window.{PWNED}=3"> free seeds for everyone',
    "x-bidi": BIDI,
    "x-long": LONG_TEXT,
}
HOSTILE_AUTHOR = "<b onmouseover=alert(1)>mallory</b>"
# The worker's per-site thresholds; the console gets the same (worker.site_thresholds), as one config would.
SITE_THRESHOLDS = {SANDBOX: {"hold": 0.0, "reject": 1.0}, HOSTILE_SITE: {"hold": 0.0, "reject": 1.0}}


# Two forum sections that hold every comment for review for a while (a site's fixed hold cutoff), so the
# queue also has single comments held by the site rule beside the campaign.
STRICT_SECTIONS = {"cycling": {"hold": 0.0, "reject": 1.0}, "events": {"hold": 0.0, "reject": 1.0}}


def strict_section_comments(n: int = 24) -> list[dict[str, str]]:
    """The first ``n`` comments of the strict sections from another hour of the invented forum."""
    from ops.lab.scenario import Scenario

    out = []
    for c in Scenario(seed=13, wave_rate_per_min=0.0).stream():
        if c.site in STRICT_SECTIONS:
            out.append({"id": "late-" + c.id, "text": c.text, "site": c.site, "author": c.author})
            if len(out) == n:
                return out
    return out


def hostile_comments() -> list[dict[str, str]]:
    """Input entries of the hostile comments, ready for the comments stream."""
    out = [{"id": cid, "text": text, "site": SANDBOX, "author": HOSTILE_AUTHOR} for cid, text in HOSTILE.items()]
    out.append({"id": "x-site", "text": "an ordinary note about the yard sale", "site": HOSTILE_SITE,
                "author": "visitor"})
    return out


def late_campaign_comments(n: int = 24) -> list[dict[str, str]]:
    """A second, invented campaign still posting when the story ends: near-duplicates from fresh accounts."""
    crafts = ("pottery", "weaving", "candle", "basket", "quilting", "woodturning")
    return [{"id": f"late-camp-{i:03d}", "site": "swap-shop", "author": f"fresh-crafter-{i}",
             "text": f"only a few seats left at the riverside {crafts[i % len(crafts)]} workshop this weekend, "
                     f"ask the organiser for the members price before the list closes tonight"}
            for i in range(n)]


def hold(client, n: int, *, start: int = 0, keys: Keys = Keys()) -> list[str]:
    """``n`` held comments as the worker's commit leaves them: the held entry and the text cache."""
    ids = []
    for i in range(start, start + n):
        cid = f"c{i}"
        client.zadd(keys.part_of(cid).held, {cid: NOW - 1000 + i})
        client.hset(keys.text(cid), mapping={"text": f"comment number {i} about the allotment fence",
                                             "site": "plots.example", "author": f"m{i}", "score": "0.7312",
                                             "action": "hold", "model": "v1", "stream_id": f"{i + 1}-0",
                                             "reasons": json.dumps([["fence", 0.4], ["allotment", -0.2]])})
        ids.append(cid)
    return ids


MODERATOR_PASSWORD = "a long enough password"


@contextlib.contextmanager
def two_moderators(client, config, *, password: str = MODERATOR_PASSWORD):
    """A console on ``client`` with two signed-in moderators, ``mod-ana`` and ``mod-bo``: ``(ana, bo)``, each
    a :class:`ops.bench.console.Browser` on the console's port (cheap scrypt cost: a test, not a deployment)."""
    from ops.bench.console import Browser, ConsoleThread
    from ops.console.accounts import Accounts
    from ops.console.app import Console

    accounts = Accounts(client=client, keys=config.keys, cost=1024)
    for name in ("mod-ana", "mod-bo"):
        accounts.add(name, password, role="moderator", now=time.time())
    with ConsoleThread(Console(client=client, config=config, accounts=accounts)) as server:
        ana, bo = Browser(server.port), Browser(server.port)
        ana.sign_in("mod-ana", password)
        bo.sign_in("mod-bo", password)
        yield ana, bo


def race_two_moderators(client, keys, ana, bo, *, n: int = 12) -> list[str]:
    """Ana rejects the newest ``2n/3`` held comments, then Bo publishes the newest ``n/3`` to ``n``: the ones Ana
    decided first are gone for Bo (the first moderator wins), and ``n`` decisions become final. The ids, newest
    first; they must come from more than one partition."""
    newest = [c.id for c in read_held(client, keys, limit=n)]
    assert len({keys.partition_of(i) for i in newest}) > 1
    first, overlap = 2 * n // 3, n // 3
    res, body = ana.post_json("/api/decide", json.dumps({"ids": newest[:first], "action": "reject"}).encode())
    assert res.status == 200 and json.loads(body)["decided"] == newest[:first]
    res, body = bo.post_json("/api/decide", json.dumps({"ids": newest[overlap:], "action": "publish"}).encode())
    second = json.loads(body)
    assert second["decided"] == newest[first:] and second["gone"] == newest[overlap:first]  # the first moderator won
    wait_until(lambda: client.xlen(keys.decisions) == n, timeout=30, what=f"{n} decisions final")
    return newest
