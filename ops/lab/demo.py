"""The whole story on one command: a forum, a spam wave, the alarms, the retrain, the wave caught.

:func:`run_demo` plays the invented Hedgerow Lane forum (:mod:`ops.lab.scenario`)
through the real parts of Seawall, in-process, on an accelerated clock:

1. a first model is trained on the forum's labelled history, pushed to the
   registry with its replay and canary sets, and promoted;
2. comments stream into the ``comments`` stream minute by minute; two
   :class:`worker.consumer.StreamConsumer` instances of one consumer group
   score them (the real batch path: validation, one model call per batch,
   routing, the campaign policy, the Lua commit), each serving the registry's
   active model through :class:`ops.registry.RegistryModelSource`;
3. after every simulated minute the wave detector (:mod:`ops.waves`) reads
   the shared per-minute counts; the campaign policy
   (:mod:`worker.campaigns`) watches every batch for near-duplicates;
4. every ten minutes simulated moderators label a sample of the held
   comments and the spam readers reported, through the ``feedback`` stream
   and the feedback consumer, into the labelled store;
5. at the nightly retrain time (``retrain.cron``) :func:`ops.retrain.retrain`
   runs through its gate; on promotion the held queue is re-scored
   (:func:`ops.rescore.rescore_held`) and both workers hot-reload from the
   registry;
6. the same wave goes on, and is now caught by the model itself.

The simulated clock is injected into every part that reads the time (the
workers' commit, the detectors, the feedback consumer, the retrain), so the
per-minute counts and windows follow the story's time, not the wall clock.
What comes back is a :class:`DemoResult` with every figure the summary table
and the HTML report (:mod:`ops.lab.demo_report`) show.
"""
from __future__ import annotations

import logging
import random
import time
from collections import Counter, defaultdict
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import datetime, timezone

from croniter import croniter
from prometheus_client import CollectorRegistry

from model.actions import FLAGGED_ACTIONS, Action
from model.classifier import EmbeddingClassifier
from ops.config import Config
from ops.cusum import WaveParams
from ops.metrics import PrometheusObserver
from ops.labelling import build_feedback_consumer, feedback_settings
from ops.monitor import Monitor
from ops.registry import Registry, RegistryModelSource, split_replay
from ops.rescore import rescore_held
from ops.retrain import retrain
from ops.lab.scenario import SITES, Scenario, ScenarioComment
from ops.serving import build_consumer, campaign_policy
from ops.waves import WaveDetector
from worker.campaignstore import campaign_keys
from worker.consumer import StreamConsumer
from worker.events import read_events
from worker.holdqueue import held_count, read_held
from worker.labels import label_name
from worker.partitions import send_comment
from worker.streams import stream_id_order

log = logging.getLogger("seawall.demo")

# The demo's forum is small (about 8 comments per section per minute) and its
# story short, so the wave detector's per-minute floor and baseline are
# lowered to fit it, and the campaign detector learns who the regulars are in
# the story's first ten minutes instead of a day; everything else runs at the
# defaults an operator would start with.  Reloads are triggered right after a promotion (see
# _nightly_retrain), so the periodic poll is kept out of the way and the run is
# the same every time.
DEMO_SETTINGS = {
    "waves.min_comments": 5,
    "waves.baseline_minutes": 15,
    "waves.campaign_warmup_s": 600,
    "metrics.sites": SITES,
    "worker.block_ms": 10,
    "worker.reload_poll_s": 3600.0,
}
# The story's hour: the stream starts 40 minutes before the nightly retrain
# (03:00 UTC by default), the wave 20 minutes in.
LEAD_S = 40 * 60.0
DURATION_S = 60 * 60.0
WAVE_START_S = 20 * 60.0
MODERATORS = ("mod-hazel", "mod-idris", "mod-juniper", "mod-kit")
WORKERS = ("hedgerow-worker-1", "hedgerow-worker-2")
MODERATION_EVERY_MIN = 5
STATUS_EVERY_MIN = 10
HELD_REVIEWED_PER_ROUND = 60
REPORTED_SHARE = 0.10  # share of published spam a reader reports (and a moderator then labels)
TRAINING_SIZE = 4000
CALIBRATION_SHARE = 0.25


class SimClock:
    """The story's clock: epoch seconds set by the demo loop, read by every part."""

    def __init__(self, start: float):
        self.now = float(start)

    def __call__(self) -> float:
        return self.now


@dataclass
class Verdict:
    comment: ScenarioComment
    action: str
    score: float
    model: str
    minute: int


@dataclass
class DemoResult:
    """Everything the run measured (figures, time series, events)."""

    scenario: Scenario
    first_model: str = ""
    retrained_model: str = ""
    retrain_ts: float = 0.0
    retrain_report: dict = field(default_factory=dict)
    rescore: dict = field(default_factory=dict)
    thresholds: dict = field(default_factory=dict)
    verdicts: list[Verdict] = field(default_factory=list)
    events: list[dict] = field(default_factory=list)
    labels_sent: Counter = field(default_factory=Counter)
    worker_seconds: float = 0.0
    wall_seconds: float = 0.0
    train_seconds: float = 0.0
    batches: Counter = field(default_factory=Counter)
    metrics: dict = field(default_factory=dict)

    # -- derived figures ----------------------------------------------------------------
    @property
    def wave_start_ts(self) -> float:
        return self.scenario.start_ts + self.scenario.wave_start_s

    @property
    def wave_end_ts(self) -> float:
        return self.scenario.start_ts + min(self.scenario.wave_end_s, self.scenario.duration_s)

    def first_event(self, kind: str) -> dict | None:
        return next((e for e in self.events if e["type"] == kind), None)

    def detection_delay_s(self, kind: str) -> float | None:
        event = self.first_event(kind)
        if event is None:
            return None
        ts = event["ts"]
        if kind == "wave_start":
            ts = (event["data"].get("minute", ts // 60) + 1) * 60.0  # the minute is known once it has ended
        return max(0.0, ts - self.wave_start_ts)

    def phase(self, v: Verdict) -> str:
        """``before`` for verdicts of the first model, ``after`` for the retrained one's."""
        return "after" if self.retrained_model and v.model == self.retrained_model else "before"

    def figures(self) -> dict:
        """The summary table's numbers, by phase (before / after the retrain)."""
        out: dict = {"comments": len(self.verdicts), "actions": Counter(v.action for v in self.verdicts),
                     "kinds": Counter(v.comment.kind for v in self.verdicts)}
        for phase in ("before", "after"):
            vs = [v for v in self.verdicts if self.phase(v) == phase]
            wave = [v for v in vs if v.comment.kind == "wave"]
            ham = [v for v in vs if v.comment.kind == "ham"]
            spam = [v for v in vs if v.comment.kind == "spam"]
            hold = {m: t.hold for m, t in self.thresholds.items()}
            out[phase] = {
                "comments": len(vs),
                "wave": len(wave),
                "wave_recall": _share(v.action in FLAGGED_ACTIONS for v in wave),
                "wave_model_recall": _share(v.score >= hold.get(v.model, 1.0) for v in wave),
                "ham": len(ham),
                "false_positive_rate": _share(v.action in FLAGGED_ACTIONS for v in ham),
                "ham_rejected": _share(v.action == Action.REJECT for v in ham),
                "spam_recall": _share(v.action in FLAGGED_ACTIONS for v in spam),
            }
        delays = {k: self.detection_delay_s(k) for k in ("campaign_start", "wave_start")}
        out["detection_delay_s"] = delays
        out["throughput"] = len(self.verdicts) / self.worker_seconds if self.worker_seconds else 0.0
        return out

    def per_minute(self) -> list[dict]:
        """Per simulated minute: comments, flagged share, and the wave's share of the comments."""
        rows: dict[int, Counter] = defaultdict(Counter)
        for v in self.verdicts:
            c = rows[v.minute]
            c["total"] += 1
            c["flagged"] += v.action in FLAGGED_ACTIONS
            c["wave"] += v.comment.kind == "wave"
            c["wave_flagged"] += v.comment.kind == "wave" and v.action in FLAGGED_ACTIONS
            c["ham_flagged"] += v.comment.kind == "ham" and v.action in FLAGGED_ACTIONS
            c["ham"] += v.comment.kind == "ham"
        n = int(self.scenario.duration_s // 60)
        return [{"minute": m, **rows.get(m, Counter())} for m in range(n)]


def metric_samples(registry: CollectorRegistry) -> dict[str, float]:
    """A few of the worker's Prometheus series at the end of the run, as a scrape would see them."""
    out: dict[str, float] = {}
    for metric in registry.collect():
        for sample in metric.samples:
            if sample.name == "seawall_comments_total":
                key = f"seawall_comments_total{{action={sample.labels.get('action')}}}"
                out[key] = out.get(key, 0.0) + sample.value
            elif sample.name in ("seawall_campaigns_active", "seawall_retrain_runs_total", "seawall_feedback_total"):
                key = sample.name + ("{" + ",".join(f"{k}={v}" for k, v in sorted(sample.labels.items())) + "}"
                                     if sample.labels else "")
                out[key] = sample.value
            elif sample.name == "seawall_wave_active" and sample.value:
                out[f"seawall_wave_active{{site={sample.labels.get('site')}}}"] = sample.value
    return out


def _share(flags) -> float | None:
    flags = list(flags)
    return sum(bool(f) for f in flags) / len(flags) if flags else None


def _text(value) -> str:
    return value.decode("utf-8", "replace") if isinstance(value, bytes) else str(value)


# -- the story's steps --------------------------------------------------------------------------

def train_first_model(scenario: Scenario, *, seed: int = 0) -> tuple[EmbeddingClassifier, list, float]:
    """Fit on the forum's history and calibrate on a held-back share of it.

    Returns the model, the ``(text, label)`` rows it was fitted on (they
    become the registry's replay and canary sets) and the seconds it took.
    """
    history = scenario.training_set(TRAINING_SIZE)
    cut = int(len(history) * (1 - CALIBRATION_SHARE))
    fit_rows = [(c.text, c.label) for c in history[:cut]]
    calib = history[cut:]
    t0 = time.perf_counter()
    model = EmbeddingClassifier(seed=seed).fit([t for t, _ in fit_rows], [y for _, y in fit_rows])
    model.calibrate([c.text for c in calib], [c.label for c in calib])
    return model, fit_rows + [(c.text, c.label) for c in calib], time.perf_counter() - t0


def bootstrap_registry(client, config: Config, model, rows, *, clock) -> str:
    """Push the first model with its replay and canary sets, and promote it."""
    registry = Registry(client=client, keys=config.keys, clock=clock)
    replay, canary = split_replay(rows, replay_max=config.retrain.replay_original,
                                  canary_size=config.retrain.canary_size, seed=config.retrain.seed)
    version = registry.push(model.to_bytes(), source="demo")
    registry.set_examples(replay=replay, canary=canary)
    registry.promote(version, actor="demo", reason="first model of the Hedgerow Lane demo")
    return version


def build_workers(client, config: Config, *, clock, observer=None) -> list[StreamConsumer]:
    """Two consumers of one group, each with its own registry model source and the campaign policy.

    Built by :func:`ops.serving.build_consumer`, as ``seawall serve`` builds its
    worker, on the story's client and clock.
    """
    workers = []
    for name in WORKERS:
        policies = [campaign_policy(config, clock=clock)] if config.waves.enabled else []
        source = RegistryModelSource(client=client, keys=config.keys, poll_interval_s=config.retrain.registry_poll_s)
        workers.append(build_consumer(config, source=source, consumer=name, policies=policies, observer=observer,
                                      client=client, clock=clock))
    return workers


class ReaderReports:
    """Spam that got published, as readers see it: read from the verdicts stream like a site would."""

    def __init__(self, *, keys, truth: dict[str, ScenarioComment]):
        self.keys = keys
        self.truth = truth
        self._last = {part.verdicts: "-" for part in keys.parts}

    def since_last(self, client) -> list[str]:
        """Ids of spam published since the previous call (first verdicts only, not re-scores), every partition."""
        out = []
        for stream, last in self._last.items():
            start = last if last == "-" else f"({last}"
            for sid, fields in client.xrange(stream, min=start):
                self._last[stream] = _text(sid)
                f = {_text(k): _text(v) for k, v in fields.items()}
                c = self.truth.get(f.get("id", ""))
                if c is not None and c.label and f.get("action") == Action.PUBLISH and f.get("rescored") != "1":
                    out.append(c.id)
        return out


def moderate(client, config: Config, rng: random.Random, truth: dict[str, ScenarioComment],
             published_spam: list[str], sent: Counter, *, review_held: bool = True) -> int:
    """One review round: label the oldest held comments and a sample of the published spam readers report."""
    held = ([c.id for c in read_held(client, config.keys, limit=HELD_REVIEWED_PER_ROUND, newest_first=False)]
            if review_held else [])
    reported = [cid for cid in published_spam if rng.random() < REPORTED_SHARE]
    pipe = client.pipeline(transaction=False)
    n = 0
    for cid in held + reported:
        comment = truth.get(cid)
        if comment is None:
            continue
        label = label_name(comment.label)
        moderator = MODERATORS[n % len(MODERATORS)]
        pipe.xadd(config.keys.feedback, {"id": cid, "label": label, "moderator": moderator,
                                         "reason": "reported" if cid in reported else "hold queue"})
        sent[label] += 1
        n += 1
    pipe.execute()
    return n


def next_retrain_ts(config: Config, after: float) -> float:
    """The first time ``retrain.cron`` fires after ``after`` (epoch seconds, UTC)."""
    start = datetime.fromtimestamp(after, tz=timezone.utc)
    return croniter(config.retrain.cron, start).get_next(float)


def demo_scenario(config: Config, *, seed: int = 7) -> Scenario:
    """The forum's hour around the nightly retrain: 40 minutes before it, 20 after."""
    base = Scenario(seed=seed).start_ts
    start = next_retrain_ts(config, base) - LEAD_S
    return Scenario(seed=seed, start_ts=start, duration_s=DURATION_S, rate_per_min=30.0, spam_share=0.04,
                    wave_start_s=WAVE_START_S, wave_end_s=DURATION_S, wave_rate_per_min=12.0, wave_accounts=200)


def run_demo(*, client, worker_client, config: Config, scenario: Scenario | None = None,
             progress: Callable[[str], None] = lambda line: None, leave_queue_at_min: int | None = None) -> DemoResult:
    """Play the whole story; see the module docstring.

    ``leave_queue_at_min`` (for ``seawall demo --console``): from that minute
    on the simulated moderators stop working the hold queue (they still label
    what readers report) and the retrain does not re-score it, so the comments
    held from then on stay for a person to decide in the console.

    ``worker_client`` is the workers' client (raw stream replies,
    :func:`worker.connection.raw_stream_replies`); ``client`` is an ordinary
    client of the same server for everything else (registry, feedback,
    detectors, retrain), as each of those processes would have its own.
    """
    scenario = scenario or demo_scenario(config)
    keys = config.keys
    t_wall = time.perf_counter()
    clock = SimClock(scenario.start_ts - 60.0)
    result = DemoResult(scenario=scenario)

    def stamp(ts: float) -> str:
        return datetime.fromtimestamp(ts, tz=timezone.utc).strftime("%H:%M")

    # 1. the first model
    model, rows, result.train_seconds = train_first_model(scenario)
    result.first_model = bootstrap_registry(client, config, model, rows, clock=clock)
    result.thresholds[result.first_model] = model.thresholds
    progress(f"{stamp(clock.now)} trained the first model {result.first_model} on {len(rows):,} labelled comments "
             f"in {result.train_seconds:.1f}s; promoted (hold >= {model.thresholds.hold:.3f}, "
             f"reject >= {model.thresholds.reject:.3f})")

    # What one `seawall serve` process runs beside its consumer: the metrics
    # observer and the monitor pass (wave detector, idle campaigns, gauges).
    registry = CollectorRegistry()
    observer = PrometheusObserver.for_config(config, registry, clock=clock)
    workers = build_workers(worker_client, config, clock=clock, observer=observer)
    for w in workers:
        w.prepare()
    feedback = build_feedback_consumer(config, consumer="hedgerow-feedback", client=client, clock=clock)
    detector = WaveDetector(client=client, keys=keys, params=WaveParams.from_settings(config.waves),
                            sites=config.metrics.sites, clock=clock)
    monitor = Monitor(client=client, keys=keys, observer=observer, detector=detector,
                      campaign_window_s=config.waves.campaign_window_s, poll_s=config.metrics.poll_s, clock=clock)
    retrain_at = next_retrain_ts(config, scenario.start_ts)
    progress(f"{stamp(clock.now)} {len(workers)} workers in group {keys.group}; the nightly retrain "
             f"({config.retrain.cron!r}) will run at {stamp(retrain_at)}; a spam wave starts at "
             f"{stamp(result.wave_start_ts)}")

    by_minute: dict[int, list[ScenarioComment]] = defaultdict(list)
    for c in scenario.stream():
        by_minute[int((c.ts - scenario.start_ts) // 60)].append(c)
    truth: dict[str, ScenarioComment] = {}
    minute_of: dict[str, int] = {}
    reports = ReaderReports(keys=keys, truth=truth)
    rng = random.Random(f"moderators:{scenario.seed}")
    announced: set[str] = set()
    seen_sites: set[tuple[str, str]] = set()
    turn = 0

    for minute in range(int(scenario.duration_s // 60)):
        minute_start = scenario.start_ts + minute * 60.0
        comments = by_minute.get(minute, [])
        pipe = client.pipeline(transaction=False)
        for c in comments:
            truth[c.id] = c
            minute_of[c.id] = minute
            send_comment(client, keys, c.fields(), pipeline=pipe)
        pipe.execute()

        # the workers score the minute's comments; the clock sits inside the minute
        clock.now = minute_start + 59.0
        remaining = len(comments)
        t0 = time.perf_counter()
        for _ in range(10 * (remaining // max(1, config.worker.batch) + 2)):
            if remaining <= 0:
                break
            worker = workers[turn % len(workers)]
            turn += 1
            done = worker.step()
            remaining -= done.read
            result.batches[worker.consumer] += 1 if done.read else 0
        result.worker_seconds += time.perf_counter() - t0

        # the minute is over: detectors read the shared counts
        clock.now = minute_start + 60.0 + 3.0
        monitor.refresh()
        for event in _read_events(client, keys):
            if event["id"] in announced:
                continue
            announced.add(event["id"])
            result.events.append(event)
            line = narrate(event, result, seen_sites)
            if line:
                progress(f"{stamp(event['ts'])} {line}")

        # published spam since the last round is what readers may report
        if (minute + 1) % MODERATION_EVERY_MIN == 0:
            leave = leave_queue_at_min is not None and minute + 1 >= leave_queue_at_min
            moderate(client, config, rng, truth, reports.since_last(client), result.labels_sent, review_held=not leave)
            feedback.drain()
            if (minute + 1) % STATUS_EVERY_MIN == 0:
                progress(f"{stamp(clock.now)} {_status(client, keys)}; "
                         f"moderators labelled {sum(result.labels_sent.values())} so far")

        if not result.retrain_ts and clock.now >= retrain_at:
            _nightly_retrain(client, config, workers, result, clock, progress, stamp,
                             rescore=leave_queue_at_min is None)

    result.verdicts = _read_verdicts(client, keys, truth, minute_of)
    result.metrics = metric_samples(registry)
    result.wall_seconds = time.perf_counter() - t_wall
    for w in workers:
        w.model_source.close()
    return result


def _nightly_retrain(client, config, workers, result: DemoResult, clock: SimClock, progress, stamp, *,
                     rescore: bool = True) -> None:
    result.retrain_ts = clock.now
    promoted: list[str] = []
    report = retrain(client, config.keys, config.retrain, clock=clock, on_promoted=promoted.append,
                     feedback=feedback_settings(config.retrain, config.worker))
    result.retrain_report = report
    labels = report.get("labels", {})
    if not report.get("promoted"):
        progress(f"{stamp(clock.now)} nightly retrain refused: {'; '.join(report.get('reasons', []))}")
        return
    version = promoted[0]
    result.retrained_model = version
    registry = Registry(client=client, keys=config.keys, clock=clock)
    model = registry.load(version)
    result.thresholds[version] = model.thresholds
    gate = report.get("gate", {}).get("sets", {}).get("holdout", {})
    progress(f"{stamp(clock.now)} nightly retrain on {labels.get('new', 0)} new labels "
             f"(+{labels.get('replay_original', 0)} replayed): holdout ROC-AUC "
             f"{gate.get('active', {}).get('roc_auc', float('nan')):.3f} -> "
             f"{gate.get(report.get('chosen'), {}).get('roc_auc', float('nan')):.3f}; promoted {version} "
             f"({report.get('chosen', '').replace('_', ' ')})")
    if not rescore:
        progress(f"{stamp(clock.now)} the hold queue is left for you ({held_count(client, config.keys)} held): "
                 "no re-score, no more simulated review")
    else:
        result.rescore = rescore_held(client, config.keys, model, batch=config.retrain.rescore_batch,
                                      settings=config.worker,
                                      verdicts_maxlen=config.worker.verdicts_maxlen)
        progress(f"{stamp(clock.now)} re-scored the hold queue: of {result.rescore.get('held', 0)} held, "
                 f"{result.rescore.get('released', 0)} published or rejected by the new model, "
                 f"{result.rescore.get('still_held', 0)} still held for a moderator")
    for w in workers:
        w.reload()  # what step() does every reload_poll_s: RegistryModelSource.poll() sees the promotion
    progress(f"{stamp(clock.now)} workers now serve {', '.join(sorted({str(w.model.version) for w in workers}))}")


def _read_events(client, keys) -> list[dict]:
    return [{"id": e.stream_id, "type": e.type, "ts": e.ts, "data": e.data} for e in read_events(client, keys.events)]


def narrate(event: dict, result: DemoResult, seen: set) -> str:
    """One progress line for an event, or "" for the ones not worth a line (repeats, ends of clusters)."""
    d = event["data"]
    kind = event["type"]
    since = event["ts"] - result.wave_start_ts
    after = f" ({since / 60:.0f} min after the wave began)" if since >= 0 else ""
    if kind == "campaign_start":
        key = (kind, d.get("site", ""))
        if key in seen:
            return ""
        seen.add(key)
        return (f"ALARM campaign on {d.get('site')}: {d.get('members')} near-duplicates from {d.get('authors')} or more "
                f"accounts, {d.get('new_share', 0):.0%} of them new, within {d.get('window_s', 0) // 60} min{after}; "
                "members are held for review")
    if kind == "wave_start":
        return (f"ALARM wave on {d.get('site')}: flagged rate {d.get('rate', 0):.0%} against a baseline of "
                f"{d.get('baseline', 0):.0%}{after}")
    if kind == "wave_end":
        return f"wave on {d.get('site')} over after {d.get('minutes')} min (peak flagged rate {d.get('peak_rate', 0):.0%})"
    return ""


def _status(client, keys) -> str:
    pipe = client.pipeline(transaction=False)
    for part in keys.parts:
        pipe.xlen(part.verdicts)
    pipe.hlen(campaign_keys(keys)["active"])
    *lengths, campaigns = pipe.execute()
    verdicts, held = sum(lengths), held_count(client, keys)
    return f"{verdicts:,} verdicts, {held} held for review, {campaigns} campaign cluster(s) active"


def _read_verdicts(client, keys, truth, minute_of) -> list[Verdict]:
    entries = []
    for part in keys.parts:
        last = "-"
        while True:
            chunk = client.xrange(part.verdicts, min=last, count=5000)
            if last != "-":
                chunk = chunk[1:]
            if not chunk:
                break
            entries += chunk
            last = _text(chunk[-1][0])
    if len(keys.parts) > 1:
        entries.sort(key=lambda entry: stream_id_order(entry[0]))  # the partitions' verdicts in time order
    out, seen = [], set()
    for _sid, fields in entries:
        f = {_text(k): _text(v) for k, v in fields.items()}
        cid = f.get("id", "")
        if f.get("rescored") == "1" or cid in seen or cid not in truth:
            continue
        seen.add(cid)
        out.append(Verdict(truth[cid], f.get("action", ""), float(f.get("score", "nan")), f.get("model", ""),
                           minute_of[cid]))
    return out
