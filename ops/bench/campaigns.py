"""``seawall bench campaigns``: what the campaign detector catches, and what it costs a worker.

Two parts (``--part``), each against one Redis (its own ``redis-server`` on a
free port unless ``--redis`` is given; each run under its own key prefix).

**board** (quality): the invented board of :mod:`ops.lab.board` (recurring formats
posted by established members over simulated days, then a test day with
campaigns from new accounts, plain and obfuscated) replayed through the
campaign policy ``seawall serve`` builds (:func:`ops.serving.campaign_policy`,
two simulated workers taking turns) on its simulated clock, with the scores of
a model trained on the board's history.  Twice: with the model *blind* to the
campaigns (each campaign comment gets the score of a random ham comment; the
site hold threshold is 0.95, so the model alone holds nothing) and with the
model's own scores.  It prints, for the test day and for all days: campaigns
started (true and false), ham held because of campaigns (members the model
alone would publish) as a share of ham, recall of plain and obfuscated
campaigns, the detection delay in comments (the first member's place in its
campaign), and the Redis CPU per comment of the replay.

**throughput** (cost): the harness of :mod:`ops.bench.stream` (a spawned
worker process built by :func:`ops.serving.build_consumer`, as ``seawall
serve`` does; the rate is read from the verdict entry ids).  Rows:

* **model only**: the real model, no batch policy, on the stream bench's
  invented comments;
* **model + campaigns**: the same, with the campaign policy.  That corpus
  joins sentences from a small pool, so nearly every comment is a
  near-duplicate of many others: the policy's worst case (every bucket dense,
  nearly every comment a campaign member);
* the same pair on **varied comments** (:func:`varied_comments`: invented
  words in fresh orders, 5 % variants of one campaign, each with an author),
  the usual case where most LSH buckets hold one comment;
* **transport ceiling**: the no-op scorer without policies.

The throughput runs start from an empty Redis and turn the new-author warm-up
off (``waves.campaign_warmup_s = 0``), so campaigns are found as they would
be on a site the detector knows.  Each row gives the worker's CPU per comment
(``process_time``), the Redis server's (``INFO cpu``) and the sum of
``INFO commandstats`` per comment (which counts the commands a script runs
both in the script's time and on their own), with the commands that cost the
most; these depend less on how busy a shared machine is than rates do.
"""
from __future__ import annotations

import os
import random
import tempfile

from model.actions import Action
from ops.bench import add_harness_arguments, report
from ops.bench.servers import LocalRedis
from ops.bench.stream import Harness, invented_comments, run_worker, train_model


#: Redis CPU per comment (INFO cpu, microseconds) of each throughput row before the commit's markers moved
#: into the text cache and a single Redis took every band in one script call: medians of nine runs of this
#: benchmark, taking turns with the code after it on the busy 2-core development machine (README, Performance).
#: Printed beside today's figures as ``<row>_redis_cpu_us_before``.
REDIS_CPU_US_BEFORE = {"model_only": 16.6, "model_campaigns": 25.0, "varied_model_only": 16.8,
                       "varied_model_campaigns": 20.4, "ceiling": 13.8}
#: the targets: Redis CPU per comment with campaigns on, campaigns on against off, campaigns on against the ceiling
TARGETS = {"redis_cpu_us_campaigns": 20.0, "campaigns_ratio_to_model_only": 0.6, "campaigns_ratio_to_ceiling": 0.30}


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
        from worker.partitions import send_comment

        pipe = self.client.pipeline(transaction=False)
        keys = self.keys
        for i, (text, author, site) in enumerate(comments, start):
            fields = {"id": f"b{i}", "text": text, "site": site}
            if author:
                fields["author"] = author
            send_comment(self.client, keys, fields, pipeline=pipe)
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
        h.client.config_resetstat()
        redis_before = h.redis_cpu_usec()
        h.wait_verdicts(len(comments), timeout_s=900)
        redis_usec = h.redis_cpu_usec() - redis_before
        commandstats_usec = commandstats_usec_total(h.client)
        by_command = commandstats_by_command(h.client)
        (stats,) = h.stop()
        ids = h.verdict_ids()
        held = _count_actions(h)
        span_s = max(ids[-1][0] - ids[0][0], 1) / 1000.0
        return {"per_s": (len(ids) - 1) / span_s, "worker_cpu_us": stats["cpu_s"] / len(ids) * 1e6,
                "redis_cpu_us": redis_usec / len(ids), "commandstats_us": commandstats_usec / len(ids),
                "held_share": held / len(ids),
                "commands_us": {k: round(v / len(ids), 2) for k, v in by_command.items()},
                "peak_rss_mb": stats["peak_rss_mb"]}
    finally:
        h.abort()
        h.cleanup()


def commandstats_usec_total(client) -> float:
    """The sum of ``usec`` over ``INFO commandstats`` (a script's commands count twice: in it and alone)."""
    return float(sum(v.get("usec", 0) for v in client.info("commandstats").values() if isinstance(v, dict)))


def commandstats_by_command(client, top: int = 6) -> dict[str, float]:
    """The ``top`` commands by ``usec`` in ``INFO commandstats`` (EVALSHA holds every script call; the
    commands a script runs are listed on their own too), in microseconds."""
    stats = {k.removeprefix("cmdstat_"): float(v.get("usec", 0))
             for k, v in client.info("commandstats").items() if isinstance(v, dict)}
    stats = {k: v for k, v in stats.items() if not k.startswith(("config", "info"))}  # the bench's own
    return dict(sorted(stats.items(), key=lambda kv: -kv[1])[:top])


def _count_actions(h: Harness) -> int:
    held, last = 0, "-"
    while True:
        page = h.client.xrange(h.key("verdicts"), min=last, count=5000)
        if last != "-":
            page = page[1:]
        if not page:
            return held
        held += sum(1 for _id, f in page if f.get(b"action") == Action.HOLD.value.encode())
        last = page[-1][0].decode()


def run(args) -> int:
    overrides = {}
    if args.bands:
        overrides["waves.campaign_bands"] = args.bands
    if args.perm:
        overrides["waves.campaign_perm"] = args.perm
    if args.signals:
        overrides["waves.campaign_signals"] = args.signals
    rows: dict = {}
    if args.part in ("board", "all"):
        rows.update(board_quality(args, overrides))
    if args.part in ("throughput", "all"):
        rows.update(throughput(args, {**overrides, "waves.campaign_warmup_s": 0}))
    report("seawall bench campaigns (one run; ratios against the model alone in the same run)", rows,
           as_json=args.json)
    return 0


def throughput(args, overrides: dict) -> dict:
    bench = [(t, "", f"site{i % 4}.example") for i, (t, _) in enumerate(invented_comments(args.comments, seed=3))]
    varied = varied_comments(args.comments)
    with tempfile.TemporaryDirectory(prefix="seawall-bench-") as tmp:
        model_path = os.path.join(tmp, "model.bin")
        model = train_model(model_path)
        if args.redis:
            figures = _measure(args.redis, model_path, bench, varied, args, overrides)
        else:
            with LocalRedis() as url:
                figures = _measure(url, model_path, bench, varied, args, overrides)
    return {"comments": args.comments, "model_version": model.version, "batch": args.batch,
            "varied_mean_chars": sum(len(t) for t, _a, _s in varied) / len(varied), **figures}


def board_quality(args, overrides: dict) -> dict:
    """Replay the invented board through the campaign policy; the figures of :meth:`ops.lab.board.Replay.figures`.

    Three replays: the headline (the model blind to the campaigns, the
    configured second signal), then the model's own scores with the second
    signal ``either`` (new authors or a spam-ward lean) and ``both``, which
    show what the score lean adds and costs.
    """
    from model.classifier import EmbeddingClassifier
    from ops.lab.board import Board, blind_scores

    board = Board(seed=args.board_seed, history_days=args.board_days)
    comments = board.comments()
    rows = board.training_rows()
    model = EmbeddingClassifier(seed=0).fit([c.text for c in rows], [c.label for c in rows])
    scores, _ = model.score_many([c.text for c in comments], top_k=0)
    out = {"board_comments": len(comments), "board_days": board.history_days + 1}
    runs = (("blind", blind_scores(comments, scores), overrides),
            ("model_either", scores, {**overrides, "waves.campaign_signals": "either"}),
            ("model_both", scores, {**overrides, "waves.campaign_signals": "both"}))
    for label, given, settings in runs:
        if args.redis:
            figures = _replay(args.redis, board, comments, given, settings, label)
        else:
            with LocalRedis() as url:
                figures = _replay(url, board, comments, given, settings, label)
        out.update(figures)
    return out


def _replay(url: str, board, comments, scores, overrides: dict, label: str) -> dict:
    import redis

    from ops.lab.board import play
    from ops.config import load_config
    from ops.serving import campaign_policy

    config = load_config({**overrides, "keys.prefix": f"seawall-bench-board-{os.getpid()}-{label}:"}, environ={})
    clock = _Clock()
    policies = [campaign_policy(config, clock=clock) for _ in range(2)]
    client = redis.Redis.from_url(url)
    try:
        client.config_resetstat()
        cpu0 = _redis_cpu_usec(client)
        replay = play(client, policies, comments, scores, set_time=clock.set, keys=config.keys,
                      window_s=config.waves.campaign_window_s)
        redis_usec = _redis_cpu_usec(client) - cpu0
        stats_usec = commandstats_usec_total(client)
        by_command = commandstats_by_command(client)
    finally:
        for key in client.scan_iter(match=config.keys.prefix + "*", count=1000):
            client.delete(key)
        client.close()
    day, whole = replay.figures(since=board.test_day_ts), replay.figures(since=0.0)
    return {
        f"{label}_signals": config.waves.campaign_signals,
        f"{label}_campaigns_started_true": day["campaigns_started_true"],
        f"{label}_campaigns_started_false": day["campaigns_started_false"],
        f"{label}_campaigns_started_false_all_days": whole["campaigns_started_false"],
        f"{label}_ham_held_by_campaigns": day["ham_held_by_campaigns"],
        f"{label}_ham_held_by_campaigns_share": day["ham_held_by_campaigns_share"],
        f"{label}_ham_held_by_campaigns_share_all_days": whole["ham_held_by_campaigns_share"],
        f"{label}_plain_recall": day["plain_recall"],
        f"{label}_obfuscated_recall": day["obfuscated_recall"],
        f"{label}_plain_recall_by_campaign": _rounded(day["plain_recall_by_campaign"]),
        f"{label}_obfuscated_recall_by_campaign": _rounded(day["obfuscated_recall_by_campaign"]),
        f"{label}_plain_delay_comments": day["plain_delay_comments"],
        f"{label}_obfuscated_delay_comments": day["obfuscated_delay_comments"],
        f"{label}_precision": day["precision"],
        f"{label}_replay_s": replay.seconds,
        f"{label}_redis_cpu_us": redis_usec / len(comments),
        f"{label}_commandstats_us": stats_usec / len(comments),
        f"{label}_redis_commands_us": {k: round(v / len(comments), 2) for k, v in by_command.items()},
    } | ({"board_test_day_ham": day["ham"], "board_all_days_ham": whole["ham"]} if label == "blind" else {})


def _rounded(shares: dict) -> dict:
    return {k: None if v is None else round(v, 3) for k, v in shares.items()}


class _Clock:
    """The replay's simulated clock, set before each batch."""

    def __init__(self):
        self.now = 0.0

    def __call__(self) -> float:
        return self.now

    def set(self, ts: float) -> None:
        self.now = ts


def _redis_cpu_usec(client) -> float:
    cpu = client.info("cpu")
    return (float(cpu["used_cpu_user"]) + float(cpu["used_cpu_sys"])) * 1e6


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
        out[f"{name}_redis_cpu_us_before"] = REDIS_CPU_US_BEFORE[name]
        out[f"{name}_commandstats_us"] = r["commandstats_us"]
        out[f"{name}_redis_commands_us"] = r["commands_us"]
        if not noop:  # the model holds some comments itself: compare with and without the policy
            out[f"{name}_held_share"] = r["held_share"]
        if campaigns:
            out[f"{name}_peak_rss_mb"] = r["peak_rss_mb"]
    out["campaigns_ratio_to_model_only"] = out["model_campaigns_per_s"] / out["model_only_per_s"]
    out["varied_campaigns_ratio_to_model_only"] = out["varied_model_campaigns_per_s"] / out["varied_model_only_per_s"]
    out["model_only_ratio_to_ceiling"] = out["model_only_per_s"] / out["ceiling_per_s"]
    # the default worker (campaigns on) against the transport ceiling, on both kinds of traffic
    out["campaigns_ratio_to_ceiling"] = out["model_campaigns_per_s"] / out["ceiling_per_s"]
    out["varied_campaigns_ratio_to_ceiling"] = out["varied_model_campaigns_per_s"] / out["ceiling_per_s"]
    out.update({f"target_{k}": v for k, v in TARGETS.items()})
    return out


def register(sub) -> None:
    parser = sub.add_parser("campaigns", help="campaign precision and recall on an invented board; worker comments/s "
                                              "with and without the campaign policy")
    add_harness_arguments(parser, comments=30_000)
    parser.add_argument("--part", choices=("board", "throughput", "all"), default="all",
                        help="board: precision and recall on the invented board; throughput: worker cost; all: both")
    parser.add_argument("--board-days", type=int, default=6, help="ordinary days before the board's test day")
    parser.add_argument("--board-seed", type=int, default=3, help="seed of the invented board")
    parser.add_argument("--bands", type=int, default=0, help="override [waves] campaign_bands (0: the default)")
    parser.add_argument("--perm", type=int, default=0, help="override [waves] campaign_perm (0: the default)")
    parser.add_argument("--signals", choices=("authors", "lean", "either", "both"), default=None,
                        help="override [waves] campaign_signals")
    parser.set_defaults(func=run)


if __name__ == "__main__":  # until `campaigns` is listed in ops/commands/bench.py: python -m ops.bench.campaigns
    import argparse

    _parser = argparse.ArgumentParser(prog="python -m ops.bench.campaigns")
    register(_parser.add_subparsers(dest="bench", required=True))
    raise SystemExit(run(_parser.parse_args(["campaigns", *__import__("sys").argv[1:]])))
