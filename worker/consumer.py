"""The worker loop: read a batch, score it in one model call, route, commit, acknowledge.

The loop knows its transport only through the seam of :mod:`worker.transport`:
a :class:`~worker.transport.CommentSource` and a :class:`~worker.transport.VerdictSink`
(Redis Streams: :mod:`worker.redistransport`; RabbitMQ: :mod:`worker.amqp`).
One loop iteration (:meth:`StreamConsumer.step`):

1. every ``claim_every_s``, take over entries other consumers left stale
   (``source.claim()``) and process them;
2. read up to ``batch`` entries (``source.read()``): first this consumer's own
   unfinished entries (left by a crash or a lost connection), then new ones;
3. validate each entry; bad ones become dead letters with their reason,
   entries delivered more than ``max_deliveries`` times become ``poison``, and
   a comment read from a partition its id does not belong to (a producer's
   mistake, :mod:`worker.partitions`) becomes ``wrong_partition`` in the
   dead-letter stream of the partition it was read from;
4. score all valid comments in ONE ``score_many`` call (with batch policies and
   a model that can, ``encode`` first and ``score_encoded`` after the policies'
   look before scoring, which get the comments' words from that one pass),
   decide each by the
   effective cutoffs of its site (:class:`worker.routing.Router`), let the
   batch policies adjust the decisions, and make sure the reasons of held and
   rejected comments list their spam-ward tokens first;
5. commit the whole batch once (``sink.commit``), then ``source.acknowledge``.

:meth:`StreamConsumer.run` repeats this until :meth:`stop` is called (the
signal handler of ``seawall serve`` does), finishing the batch in hand.  A
:class:`~worker.transport.TransientError` (and nothing else) is logged and
retried with capped exponential backoff; the batch in hand stays unacknowledged
and is read again, so nothing the transport kept is lost.
"""
from __future__ import annotations

import logging
import os
import socket
import time
from collections.abc import Sequence
from dataclasses import dataclass, field

from concurrent.futures import ThreadPoolExecutor

from worker.commit import WRITTEN
from worker.deadletters import DeadLetterLog
from worker.loader import ModelSource
from worker.observer import NullObserver, WorkerObserver
from worker.policies import BatchPolicy, PolicyState, apply_policies, held_before_scoring
from worker.routing import Router, explain_decisions
from worker.settings import Keys, WorkerSettings
from worker.streams import Entry, stream_id_ms
from worker.transport import Backoff, Batch, CommentSource, TransientError, VerdictSink
from worker.validation import Comment, DeadLetter, Limits as InputLimits, comment_dead_letter, dead_letter, validate
from worker.verdicts import Verdict

log = logging.getLogger("seawall.worker")

# Tokens in each verdict's reasons.
TOP_K = 5


def default_consumer_name() -> str:
    return f"{socket.gethostname()}-{os.getpid()}"


@dataclass
class BatchResult:
    """What one processed batch came to (for tests and the bench)."""

    read: int = 0
    written: int = 0
    duplicates: int = 0
    dead: dict = field(default_factory=dict)

    def add(self, other: "BatchResult") -> None:
        self.read += other.read
        self.written += other.written
        self.duplicates += other.duplicates
        for reason, n in other.dead.items():
            self.dead[reason] = self.dead.get(reason, 0) + n


class StreamConsumer:
    """One worker: comments from a source, verdicts to a sink.

    Parameters
    ----------
    source : where batches come from (its ``consumer`` names this worker).
    sink : where their verdicts and dead letters are committed.
    state : the batch policies' state port (see :mod:`worker.policies`).
    keys : key names (``Config.keys``), for the dead-letter log.
    settings : ``Config.worker``.
    model_source : where the model comes from; polled for hot reloads.
    observer : receives batch, verdict, dead-letter, model, lag and reconnect reports.
    policies : batch policies run after routing and before the commit.

    :func:`worker.redistransport.redis_consumer` builds one on Redis Streams.
    """

    def __init__(
        self,
        *,
        source: CommentSource,
        sink: VerdictSink,
        keys: Keys,
        settings: WorkerSettings,
        model_source: ModelSource,
        state: PolicyState | None = None,
        observer: WorkerObserver | None = None,
        policies: Sequence[BatchPolicy] = (),
        clock=time.time,
    ):
        self.source = source
        self.sink = sink
        self.state = state
        self.keys = keys
        self.settings = settings
        self.model_source = model_source
        self.consumer = source.consumer
        self.observer = observer if observer is not None else NullObserver()
        self.policies = tuple(policies)
        self.clock = clock
        if self.policies and state is None:
            raise ValueError("StreamConsumer: policies need a state port (state=...)")
        self._input_limits = InputLimits.from_settings(settings)
        self._backoff = Backoff.from_settings(settings)
        self._model = None
        self._router = None
        self._stopping = False
        self._ready = False
        self._next_claim = 0.0
        self._next_reload = 0.0
        self._next_lag = 0.0
        self._reports_verdicts = not isinstance(self.observer, NullObserver)
        self._executor: ThreadPoolExecutor | None = None
        self._inflight = None
        if keys.partitions == 1:
            self._deadletter_log = DeadLetterLog(logger=log, source=keys.comments, deadletter=keys.deadletter)
        else:
            self._deadletter_log = DeadLetterLog(logger=log, source=f"the {keys.partitions} comment partitions",
                                                 deadletter="each partition's deadletter stream")

    # -- life cycle ---------------------------------------------------------------------------

    def stop(self) -> None:
        """Ask the loop to stop after the batch in hand (safe to call from a signal handler)."""
        self._stopping = True

    @property
    def stopping(self) -> bool:
        return self._stopping

    @property
    def model(self):
        return self._model

    def prepare(self) -> None:
        """Load the model, then let the source create its group or queue and go back to its own backlog."""
        if self._model is None:
            self._install(self.model_source.current())
        self.source.prepare()
        self._ready = True

    def run(self) -> int:
        """Process batches until :meth:`stop`; returns the exit code (0).

        With ``settings.overlap_commit`` a batch is committed on a second
        thread while the next one is read and scored; commits still happen
        one at a time and in order, each batch is acknowledged on this thread
        after its commit, and the last one is waited for before returning.
        """
        log.info("consumer %s reading %s", self.consumer, self.source.describe)
        if self.settings.overlap_commit:
            self._executor = ThreadPoolExecutor(max_workers=1, thread_name_prefix="seawall-commit")
        try:
            self._loop()
        finally:
            self._abandon_inflight()
            if self._executor is not None:
                self._executor.shutdown(wait=True)
                self._executor = None
            release = getattr(self.source, "release", None)
            if release is not None:  # give back partition leases, for the other workers to take now
                release()
        log.info("consumer %s stopped", self.consumer)
        return 0

    def _loop(self) -> None:
        failures = 0
        service = ""
        while not self._stopping:
            try:
                if not self._ready:
                    self.prepare()
                self.step(overlap=True)
            except TransientError as exc:
                self._abandon_inflight()
                self._ready = False
                cause = exc.__cause__ if exc.__cause__ is not None else exc
                service = getattr(self.source, "service", "the transport")
                if exc.regroup:
                    log.warning("%s (%s); preparing the source again", exc.what, self.source.describe)
                    continue
                failures += 1
                delay = self.backoff(failures)
                log.warning("%s (%s: %s); retrying in %.2fs (attempt %d)",
                            exc.what, type(cause).__name__, cause, delay, failures)
                self._sleep(delay)
                continue
            if failures:
                log.info("reconnected to %s after %d failed attempt(s)", service, failures)
                self.observer.on_reconnect()
                failures = 0

    def backoff(self, failures: int) -> float:
        return self._backoff.delay(failures)

    def _sleep(self, seconds: float) -> None:
        deadline = time.monotonic() + seconds
        while not self._stopping:
            left = deadline - time.monotonic()
            if left <= 0:
                return
            time.sleep(min(left, 0.05))

    # -- one iteration ------------------------------------------------------------------------

    def step(self, *, overlap: bool = False) -> BatchResult:
        """Reload if due, reclaim if due, then read and process one batch."""
        self._deadletter_log.flush()
        now = time.monotonic()
        if now >= self._next_reload:
            self._next_reload = now + self.settings.reload_poll_s
            self.reload()
        if now >= self._next_claim:
            self._next_claim = now + self.settings.claim_every_s
            self.reclaim()
        if self._reports_verdicts and now >= self._next_lag:
            self._next_lag = now + self.settings.lag_every_s
            self.report_lag()
        return self.process_batch(self.source.read(block=True), overlap=overlap)

    def reclaim(self) -> BatchResult:
        """Take over entries other consumers left stale and process them."""
        self.settle()
        total = BatchResult()
        for batch in self.source.claim():
            if batch.gone:
                for _ in batch.gone:
                    self.observer.on_deadletter("trimmed")
                self._deadletter_log.add("trimmed", "the entry was deleted from the stream before it was scored",
                                         count=len(batch.gone))
            if batch.entries:
                log.info("took over %d idle entries", len(batch.entries))
                total.add(self.process_batch(batch))
            if self._stopping:
                break
        return total

    def reload(self) -> None:
        model = self.model_source.poll()
        if model is not None:
            self._install(model)

    def _install(self, model) -> None:
        router = Router.for_model(model, self.settings)
        self._model, self._router = model, router
        cutoffs = router.cutoffs("")
        log.info("serving model %s (hold %.4f, reject %.4f)", model.version, cutoffs.hold, cutoffs.reject)
        for warning in router.warnings():
            log.warning("model %s: %s", model.version, warning)
        self.observer.on_model(str(model.version), float(getattr(model, "created_at", 0.0) or 0.0))

    def report_lag(self) -> None:
        lag = self.source.lag()
        if lag is not None:
            self.observer.on_lag(lag.lag, lag.pending, lag.partitions)

    # -- one batch ------------------------------------------------------------------------------

    def process(self, entries: Sequence[Entry], *, deliveries: dict[bytes, int] | None = None) -> BatchResult:
        """:meth:`process_batch` for entries in hand (tests and tools)."""
        return self.process_batch(Batch(list(entries), deliveries))

    def process_batch(self, batch: Batch, *, overlap: bool = False) -> BatchResult:
        """Validate, score, route, commit and acknowledge ``batch``; never raises on bad input.

        With ``overlap`` (used by :meth:`run`), the commit goes to the commit
        thread and this returns once the batch is scored; the counts of the
        returned result are filled in when the commit settles (see :meth:`settle`).
        """
        entries, deliveries = batch.entries, batch.deliveries
        result = BatchResult(read=len(batch))
        if not len(batch):
            return result
        t0 = time.perf_counter()
        limits = self._input_limits
        max_deliveries = self.settings.max_deliveries
        partition = batch.partition if self.keys.partitions > 1 else None
        comments: list[Comment] = []
        dead: list[DeadLetter] = list(batch.dead)
        for entry in entries:
            checked = validate(entry, limits)
            count = deliveries.get(entry.stream_id, 1) if deliveries else 1
            if count > max_deliveries:
                checked = dead_letter(entry, "poison", f"delivered {count} times, limit {max_deliveries}", limits)
            elif partition is not None and isinstance(checked, Comment):
                belongs = self.keys.partition_of(checked.id)
                if belongs != partition:
                    checked = dead_letter(entry, "wrong_partition",
                                          f"read from partition {partition}, but its id belongs to partition {belongs}",
                                          limits)
            (comments if isinstance(checked, Comment) else dead).append(checked)

        scored, failed = self._score(comments)
        dead.extend(failed)
        model = self._model
        now = self.clock()
        done = (batch, scored, dead, model, now, result, t0, len(batch))
        if overlap and self._executor is not None:
            self.settle()  # commits stay in order: one in flight at a time
            self._inflight = (self._executor.submit(self._commit, batch, scored, dead, model, now), done)
            return result
        return self._finish(self._commit(batch, scored, dead, model, now), *done)

    def _commit(self, batch: Batch, scored, dead, model, now) -> list[int]:
        return self.sink.commit(batch, scored, dead, model=str(model.version), now=now)

    def settle(self) -> BatchResult | None:
        """Wait for the commit in flight, if any, and report it; its errors are raised here."""
        if self._inflight is None:
            return None
        future, done = self._inflight
        self._inflight = None
        return self._finish(future.result(), *done)

    def _abandon_inflight(self) -> None:
        # After a failure elsewhere: let the commit in flight end; if it failed too, its
        # entries are still unacknowledged and are read again from this consumer's backlog.
        try:
            self.settle()
        except TransientError as exc:
            log.warning("the batch being committed did not commit (%s); it stays pending", exc.what)

    def _finish(self, codes, batch: Batch, scored, dead, model, now, result: BatchResult, t0: float,
                size: int) -> BatchResult:
        self.source.acknowledge(batch)
        n = len(scored)
        written = [s for s, code in zip(scored, codes[:n]) if code == WRITTEN]
        result.written = len(written)
        result.duplicates = n - len(written)
        for d, code in zip(dead, codes[n:]):
            if code == WRITTEN:
                result.dead[d.reason] = result.dead.get(d.reason, 0) + 1
                self.observer.on_deadletter(d.reason)
                self._deadletter_log.add(d.reason, d.detail)
        if self._reports_verdicts and written:
            now_ms = now * 1000.0
            self.observer.on_verdicts([
                {"id": s.comment.id, "site": s.comment.site, "action": s.action, "score": float(s.score),
                 "model": str(model.version), "stream_id": s.comment.stream_id,
                 "latency_s": max(0.0, (now_ms - stream_id_ms(s.comment.stream_id)) / 1000.0)}
                for s in written
            ])
        if result.duplicates:
            log.info("skipped %d comment(s) that already had a verdict", result.duplicates)
        self.observer.on_batch(size, time.perf_counter() - t0)
        return result

    def _score(self, comments: list[Comment]) -> tuple[list[Verdict], list[DeadLetter]]:
        """One ``score_many`` call for the batch; if it fails, find the comments it fails on."""
        if not comments:
            return [], []
        model = self._model
        # A spam wave repeats itself word for word: score each distinct text once.
        slots: dict[str, int] = {}
        index = [slots.setdefault(c.text, len(slots)) for c in comments]
        cutoffs = self._router.hold_cutoffs([c.site for c in comments])
        texts = list(slots)
        encoded = None
        if self.policies:  # comments a policy holds whatever they score: their reasons ranked spam-ward now
            encoded, words = self._encode(model, texts, index)
            for i in held_before_scoring(self.policies, self.state, comments, words):
                cutoffs[i] = 0.0
        if len(slots) < len(comments):
            # One text on sites with different hold cutoffs is ranked for the highest of them;
            # a comment held below it is explained again in _route.
            highest = [1.0] * len(slots)
            seen = [False] * len(slots)
            for slot, cutoff in zip(index, cutoffs):
                highest[slot] = cutoff if not seen[slot] else max(highest[slot], cutoff)
                seen[slot] = True
            cutoffs = highest
        try:
            if encoded is not None:
                scores, reasons = model.score_encoded(encoded, top_k=TOP_K, spamward_from=cutoffs)
            else:
                scores, reasons = model.score_many(texts, top_k=TOP_K, spamward_from=cutoffs)
            scores = [float(s) for s in scores]
            if len(scores) != len(slots) or len(reasons) != len(slots):
                raise ValueError(f"score_many returned {len(scores)} scores for {len(slots)} texts")
        except Exception:  # a model bug on some input must not stop the stream: isolate it below
            log.exception("score_many failed on a batch of %d; scoring one by one", len(comments))
            return self._score_each(comments)
        if len(slots) < len(comments):
            scores = [scores[i] for i in index]
            reasons = [reasons[i] for i in index]
            cutoffs = [cutoffs[i] for i in index]
        return self._route(comments, scores, reasons, cutoffs)

    @staticmethod
    def _encode(model, texts: list[str], index: list[int]):
        """The batch cut into features once, for the policies (its words) and for scoring, when the model
        can (``encode``/``score_encoded``; the model contract needs only ``score_many``): ``(encoded, words
        of each comment)``, or ``(None, None)``.  A text the model fails on is isolated by scoring."""
        encode = getattr(model, "encode", None)
        if encode is None or getattr(model, "score_encoded", None) is None:
            return None, None
        try:
            encoded = encode(texts)
            return encoded, encoded.words(index)
        except Exception:  # noqa: BLE001 - score_many meets the same text and isolates it
            log.debug("encoding the batch for its policies failed; scoring will isolate the text")
            return None, None

    def _score_each(self, comments: list[Comment]) -> tuple[list[Verdict], list[DeadLetter]]:
        good, scores, reasons, cutoffs, dead = [], [], [], [], []
        for c in comments:
            try:
                cutoff = self._router.hold_cutoffs([c.site])
                s, r = self._model.score_many([c.text], top_k=TOP_K, spamward_from=cutoff)
                good.append(c)
                scores.append(float(s[0]))
                reasons.append(r[0])
                cutoffs.append(cutoff[0])
            except Exception as exc:  # noqa: BLE001 - reported as a dead letter, never swallowed
                dead.append(comment_dead_letter(c, "score_error", f"{type(exc).__name__} in the model",
                                                self._input_limits))
        scored, bad = self._route(good, scores, reasons, cutoffs)
        return scored, dead + bad

    def _route(self, comments, scores, reasons, ranked_from) -> tuple[list[Verdict], list[DeadLetter]]:
        """Decide, let the policies adjust, and explain each final action (``ranked_from``: the
        cutoff each comment's reasons were ranked for; see :func:`worker.routing.explain_decisions`)."""
        dead = []
        if not all(0.0 <= s <= 1.0 for s in scores):  # NaN fails both comparisons
            keep = [i for i, s in enumerate(scores) if 0.0 <= s <= 1.0]
            dead = [comment_dead_letter(comments[i], "score_error", "the model gave a score outside [0, 1]",
                                        self._input_limits)
                    for i in range(len(scores)) if not 0.0 <= scores[i] <= 1.0]
            comments = [comments[i] for i in keep]
            scores = [scores[i] for i in keep]
            reasons = [reasons[i] for i in keep]
            ranked_from = [ranked_from[i] for i in keep]
        decisions = self._router.decide_many(scores, [c.site for c in comments])
        if self.policies:
            decisions = apply_policies(self.policies, self.state, comments, scores, decisions)
        try:
            reasons = explain_decisions(self._model, [c.text for c in comments], scores, decisions, list(reasons),
                                        ranked_from, top_k=TOP_K)
        except Exception:  # noqa: BLE001 - the scores stand; only the order of the reasons is lost
            log.exception("explaining held comments again failed; their reasons keep the model's order")
        scored = [Verdict.of(c, s, d, r) for c, s, d, r in zip(comments, scores, decisions, reasons)]
        return scored, dead

