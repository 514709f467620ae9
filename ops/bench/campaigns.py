"""``seawall bench campaigns``: what the campaign policy costs a worker, end to end.

One run, one Redis (its own ``redis-server`` on a free port unless ``--redis``
is given), the harness of :mod:`ops.bench.stream` (a spawned worker process
built by :func:`ops.serving.build_consumer`, as ``seawall serve`` does; the
rate is read from the verdict entry ids).  Rows:

* **model only**: the real model, no batch policy, on the stream bench's
  invented comments;
* **model + campaigns**: the same, with the campaign policy that
  ``seawall serve`` builds from ``[waves]`` (:func:`ops.monitor.campaign_policy`).
  That corpus joins sentences from a small pool, so nearly every comment is a
  near-duplicate of many others: the policy's worst case (every bucket dense,
  nearly every comment a campaign member);
* the same pair on **varied comments** (:func:`varied_comments`: invented
  words in fresh orders, 5 % variants of one campaign, each with an author),
  the usual case where most LSH buckets hold one comment;
* **transport ceiling**: the no-op scorer without policies.

Each row also gives the worker's CPU per comment (``process_time``) and the
Redis server's (``INFO cpu``), which depend less on how busy a shared machine
is than rates do.
"""
from __future__ import annotations

import os
import random
import tempfile

from ops.bench import add_harness_arguments, report
from ops.bench.servers import LocalRedis
from ops.bench.stream import Harness, invented_comments, run_worker, train_model


class PolicyHarness(Harness):
    """:class:`ops.bench.stream.Harness` whose worker may run the campaign policy and whose comments carry authors."""

    def __init__(self, *, campaigns: bool, overrides: dict | None = None, **kw):
        super().__init__(**kw)
        self.campaigns = campaigns
        self.overrides.update(overrides or {})

    def start(self, n: int, *, noop: bool) -> None:
        if n != 1:
            raise ValueError("bench campaigns: one worker process per run")
        ready = self.ctx.Event()
        proc = self.ctx.Process(target=run_worker, daemon=True,
                                args=(self.overrides, self.model_path, noop, self.campaigns, "bench-0", ready,
                                      self.results))
        proc.start()
        self.procs.append(proc)
        while not ready.wait(0.1):
            if not proc.is_alive():
                raise RuntimeError(f"bench: worker process exited with {proc.exitcode} before it was ready")

    def enqueue(self, comments, start: int = 0) -> None:
        pipe = self.client.pipeline(transaction=False)
        stream = self.key("comments")
        for i, (text, author, site) in enumerate(comments, start):
            fields = {"id": f"b{i}", "text": text, "site": site}
            if author:
                fields["author"] = author
            pipe.xadd(stream, fields)
            if len(pipe) >= 1000:
                pipe.execute()
        pipe.execute()


def varied_comments(n: int, *, seed: int = 5, campaign_share: float = 0.05) -> list[tuple[str, str, str]]:
    """``n`` comments (text, author, site) where most LSH buckets hold one comment, as on a real site.

    Most are the stream bench's invented words in a fresh random order (about
    200 characters, no two sharing many 3-word shingles) from 5,000 invented
    authors; ``campaign_share`` of them are variants of one invented campaign
    template (a changing name and link) from 300 fresh accounts.
    """
    from ops.bench.stream import _HAM, _SPAM

    rng = random.Random(f"bench-campaigns-{seed}")
    vocab = sorted({w for s in _HAM + _SPAM for w in s.split()})
    out = []
    for i in range(n):
        if rng.random() < campaign_share:
            name = rng.choice(("ash", "bea", "cal", "dot", "eve", "fox", "gil", "hob"))
            text = (f"hey {name} I made 900 dollars this week working from home with one simple trick that banks "
                    f"hate see how at easycash{rng.randrange(10**6)}.invalid before it is gone for good")
            author = f"fresh{rng.randrange(300)}"
        else:
            words = []
            while sum(len(w) + 1 for w in words) < 200:
                words.append(rng.choice(vocab))
            text, author = " ".join(words), f"member{rng.randrange(5000)}"
        out.append((text, author, f"site{i % 4}.example"))
    return out


def _throughput(url, prefix, model_path, comments, *, noop, campaigns, batch, block_ms, overrides) -> dict:
    h = PolicyHarness(url=url, prefix=prefix, model_path=model_path, batch=batch, block_ms=block_ms,
                      campaigns=campaigns, overrides=overrides)
    try:
        h.enqueue(comments)
        h.start(1, noop=noop)
        redis_before = h.redis_cpu_usec()
        h.wait_verdicts(len(comments), timeout_s=900)
        redis_usec = h.redis_cpu_usec() - redis_before
        (stats,) = h.stop()
        ids = h.verdict_ids()
        held = _count_actions(h)
        span_s = max(ids[-1][0] - ids[0][0], 1) / 1000.0
        return {"per_s": (len(ids) - 1) / span_s, "worker_cpu_us": stats["cpu_s"] / len(ids) * 1e6,
                "redis_cpu_us": redis_usec / len(ids), "held_share": held / len(ids),
                "peak_rss_mb": stats["peak_rss_mb"]}
    finally:
        if h.procs:
            h.stop()
        h.cleanup()


def _count_actions(h: Harness) -> int:
    held, last = 0, "-"
    while True:
        page = h.client.xrange(h.key("verdicts"), min=last, count=5000)
        if last != "-":
            page = page[1:]
        if not page:
            return held
        held += sum(1 for _id, f in page if f.get(b"action") == b"hold")
        last = page[-1][0].decode()


def run(args) -> int:
    bench = [(t, "", f"site{i % 4}.example") for i, (t, _) in enumerate(invented_comments(args.comments, seed=3))]
    varied = varied_comments(args.comments)
    overrides = {}
    if args.bands:
        overrides["waves.campaign_bands"] = args.bands
    if args.perm:
        overrides["waves.campaign_perm"] = args.perm
    with tempfile.TemporaryDirectory(prefix="seawall-bench-") as tmp:
        model_path = os.path.join(tmp, "model.bin")
        model = train_model(model_path)
        if args.redis:
            figures = _measure(args.redis, model_path, bench, varied, args, overrides)
        else:
            with LocalRedis() as url:
                figures = _measure(url, model_path, bench, varied, args, overrides)
    rows = {"comments": args.comments, "model_version": model.version, "batch": args.batch,
            "varied_mean_chars": sum(len(t) for t, _a, _s in varied) / len(varied), **figures}
    report("seawall bench campaigns (one run; ratios against the model alone in the same run)", rows,
           as_json=args.json)
    return 0


def _measure(url, model_path, bench, varied, args, overrides) -> dict:
    tag = f"seawall-bench-campaigns-{os.getpid()}"
    kw = {"batch": args.batch, "block_ms": args.block_ms, "overrides": overrides}
    runs = {
        "model_only": (bench, False, False),
        "model_campaigns": (bench, False, True),
        "varied_model_only": (varied, False, False),
        "varied_model_campaigns": (varied, False, True),
        "ceiling": (bench, True, False),
    }
    out = {}
    for name, (comments, noop, campaigns) in runs.items():
        r = _throughput(url, f"{tag}-{name}:", model_path, comments, noop=noop, campaigns=campaigns, **kw)
        out[f"{name}_per_s"] = r["per_s"]
        out[f"{name}_worker_cpu_us"] = r["worker_cpu_us"]
        out[f"{name}_redis_cpu_us"] = r["redis_cpu_us"]
        if not noop:  # the model holds some comments itself: compare with and without the policy
            out[f"{name}_held_share"] = r["held_share"]
        if campaigns:
            out[f"{name}_peak_rss_mb"] = r["peak_rss_mb"]
    out["campaigns_ratio_to_model_only"] = out["model_campaigns_per_s"] / out["model_only_per_s"]
    out["varied_campaigns_ratio_to_model_only"] = out["varied_model_campaigns_per_s"] / out["varied_model_only_per_s"]
    out["model_only_ratio_to_ceiling"] = out["model_only_per_s"] / out["ceiling_per_s"]
    return out


def register(sub) -> None:
    parser = sub.add_parser("campaigns", help="worker comments/s with and without the campaign policy, and the ceiling")
    add_harness_arguments(parser, comments=30_000)
    parser.add_argument("--bands", type=int, default=0, help="override [waves] campaign_bands (0: the default)")
    parser.add_argument("--perm", type=int, default=0, help="override [waves] campaign_perm (0: the default)")
    parser.set_defaults(func=run)


if __name__ == "__main__":  # until `campaigns` is listed in ops/commands/bench.py: python -m ops.bench.campaigns
    import argparse

    _parser = argparse.ArgumentParser(prog="python -m ops.bench.campaigns")
    register(_parser.add_subparsers(dest="bench", required=True))
    raise SystemExit(run(_parser.parse_args(["campaigns", *__import__("sys").argv[1:]])))
