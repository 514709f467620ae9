"""A realistic hold queue for the console's tests, built through the real worker.

The invented Hedgerow Lane forum (ops/scenario.py): a model trained on its
history scores a slice of its stream.  Background spam is held by the model
(reject is set to 1.0, as a cautious operator would), the soil-additive
campaign is held by the real campaign policy once it is detected, and the
strict ``events`` section holds some ordinary comments by its own threshold.
Hostile comments (script tags, ``javascript:`` links, bidi overrides, a
64 KiB text, markup in the author and site) go to a sandbox site that holds
everything.  Every held comment carries the worker's real cache entry and
reasons.
"""
from __future__ import annotations

import time

import redis
from functools import lru_cache

from model.calibration import Thresholds
from model.minhash import MinHasher
from ops.bench.console import fill_queue
from ops.registry import Registry
from ops.scenario import Scenario
from worker.campaigns import CampaignPolicy

SANDBOX = "sandbox.example"
HOSTILE_SITE = 'yard"><script>window.__seawall_pwned=4</script>.example'
PWNED = "__seawall_pwned"
BIDI = "Lovely photos \u202egnp.exe\u202c and \u2066isolated\u2069 text"
LONG_TEXT = ("Our allotment diary, week by week. " * 2000)[:65_536]  # 64 KiB, the worker's limit
# The worker's per-site thresholds; give the console the same (worker.site_thresholds), as one config would.
SITE_THRESHOLDS = {"events": {"hold": 0.0005}, SANDBOX: {"hold": 0.0, "reject": 1.0},
                   HOSTILE_SITE: {"hold": 0.0, "reject": 1.0}}
HOSTILE = {
    "x-script": f"<script>window.{PWNED} = 1</script> Great photos of the harbour!",
    "x-link": f'<a href="javascript:window.{PWNED}=2">claim your prize</a> or paste javascript:window.{PWNED}=2',
    "x-img": f'<img src=x onerror="window.{PWNED}=3"> free seeds for everyone',
    "x-bidi": BIDI,
    "x-long": LONG_TEXT,
}


@lru_cache(maxsize=1)
def forum_model():
    """The forum's model (trained once per test session): hold at 0.5, never reject."""
    from model.classifier import EmbeddingClassifier

    history = Scenario(seed=7).training_set(1500)
    model = EmbeddingClassifier(seed=0, epochs=3).fit([c.text for c in history], [c.label for c in history])
    model.thresholds = Thresholds(hold=0.5, reject=1.0)
    return model


def forum_slice(*, wave: int = 50, spam: int = 8, events_ham: int = 10):
    """The first ``wave`` campaign comments, ``spam`` background spam and ``events_ham`` ordinary
    comments of the ``events`` section from the forum's stream."""
    s = Scenario(seed=7, duration_s=3600, wave_start_s=60, wave_end_s=3600, rate_per_min=30, wave_rate_per_min=12,
                 wave_accounts=200)
    picked = {"wave": [], "spam": [], "ham": []}
    want = {"wave": wave, "spam": spam, "ham": events_ham}
    for c in s.stream():
        if c.kind == "ham" and c.site != "events":
            continue
        if len(picked[c.kind]) < want[c.kind]:
            picked[c.kind].append(c)
        if all(len(picked[k]) >= want[k] for k in want):
            break
    return picked


def build_queue(url: str, keys, *, now: float | None = None, wave: int = 50) -> dict[str, list[str]]:
    """Fill the hold queue on the Redis at ``url``; returns the ids sent, by kind."""
    now = time.time() if now is None else now
    model = forum_model()
    client = redis.Redis.from_url(url)
    registry = Registry(client=client, keys=keys, clock=lambda: now - 7200)
    version = registry.push(model.to_bytes(), source="push")
    registry.promote(version, actor="test", reason="the forum's first model")
    picked = forum_slice(wave=wave)
    thresholds = SITE_THRESHOLDS

    def fields(c, **extra):
        return dict({"id": c.id, "text": c.text, "site": c.site, "author": c.author}, **extra)

    # an hour of background spam and ordinary comments, then the campaign in its last minutes
    for i, c in enumerate(picked["spam"] + picked["ham"]):
        fill_queue(url, keys, [fields(c)], model, site_thresholds=thresholds,
                   clock=lambda i=i: now - 3600 + i * 150)
    hostile = [{"id": cid, "text": text, "site": SANDBOX, "author": "<b onmouseover=alert(1)>mallory</b>"}
               for cid, text in HOSTILE.items()]
    hostile.append({"id": "x-site", "text": "an ordinary note about the yard sale", "site": HOSTILE_SITE,
                    "author": "visitor"})
    fill_queue(url, keys, hostile, model, site_thresholds=thresholds, clock=lambda: now - 1200)
    bad = [{"id": "bad-1", "body": "a text under the wrong field name"}, {"id": "bad-2", "text": "   "},
           {"text": "no id at all"}]
    fill_queue(url, keys, bad, model, clock=lambda: now - 900)
    policy = CampaignPolicy(keys=keys, hasher=MinHasher(num_perm=64, shingle=3, seed=0), bands=16, min_size=10,
                            min_authors=3, window_s=600, min_words=6, hold=True, clock=lambda: now - 300)
    fill_queue(url, keys, [fields(c) for c in picked["wave"]], model, site_thresholds=thresholds,
               policies=[policy], clock=lambda: now - 300)
    client.close()
    return {"wave": [c.id for c in picked["wave"]], "spam": [c.id for c in picked["spam"]],
            "ham": [c.id for c in picked["ham"]], "hostile": [h["id"] for h in hostile]}


def background_traffic(url: str, keys, *, now: float, hours: int = 3, per_step: int = 40, step_s: int = 300) -> int:
    """Ordinary traffic and background spam over the last ``hours``, through the worker, for the overview's
    chart; nothing of it is held (the forum model publishes ham and holds spam, which goes to the queue)."""
    model = forum_model()
    s = Scenario(seed=11, start_ts=now - hours * 3600, duration_s=hours * 3600, rate_per_min=per_step * 60 / step_s,
                 spam_share=0.04, wave_rate_per_min=0.0)
    by_step: dict[int, list] = {}
    for c in s.stream():
        by_step.setdefault(int((c.ts - s.start_ts) // step_s), []).append(
            {"id": "bg-" + c.id, "text": c.text, "site": c.site, "author": c.author})
    sent = 0
    for step, comments in sorted(by_step.items()):
        sent += fill_queue(url, keys, comments, model, clock=lambda step=step: s.start_ts + step * step_s + 30)
    return sent
